"""The report's words on the carry along proxy size: the backtest first, the target's depth, the section.

Numbers come from fit.json's `transfer` block through `Words`, so the HTML tags each with its key.
`lead_blocks` open the answer (the held-out check when there is one, then the target's depth beside
the proxy-only answer that follows); `section_blocks` are the section "From proxies to the target".
"""
from __future__ import annotations

from typing import Any, Sequence

from ..fit_record import FitResult, Transfer, TransferVerify, given
from ..fitting.transfer import FAR_FACTOR, SHORT_FACTOR
from ..records import RunResult
from .inputs import ReportInputs
from .markup import Block, Words

__all__ = ["lead_blocks", "section_blocks", "headline_runs"]

_T = "transfer."


def _size(width: Any, rows: Any) -> str:
    return ", ".join(p for p in (f"width {width}" if width else "", f"{rows:,} training rows" if rows else "") if p)


def _transfer(fit: FitResult) -> Transfer | None:
    """The fit's `transfer` block, None when it has none (or an empty one)."""
    t = fit.transfer
    return t if t and t.to_dict() else None


def headline_runs(fit: FitResult, runs: Sequence[RunResult]) -> list[RunResult]:
    """The runs of the proxy size the headline describes (all runs without size axes)."""
    t = _transfer(fit)
    head = t.headline_size if t else None
    if not head:
        return list(runs)
    w, n = head.get("width") or 0, head.get("train_rows") or 0
    return [r for r in runs if (not w or r.width == w) and (r.train_rows or 0) == n]


def _factor_words(factors: dict[str, float]) -> str:
    return ", ".join(f"{v:.1f}x the largest proxy's {a.replace('_', ' ')}" for a, v in factors.items())


def _check_words(v: TransferVerify, w: Words) -> str:
    p, m = v.predicted or {}, v.measured or {}
    where = _size(v.width, v.train_rows)
    when = (f", stored {v.predicted_at} before it trained" if v.predicted_at
            and v.prediction_source == "stored before training" else
            ", recomputed now (no prediction was stored before it trained)")
    if not p or (p.get("reversal_depth") is None and p.get("slope") is None):
        return (f"**Held-out check ({where}).** No prediction could be made from the smaller sizes"
                f"{'' if not v.verdict else ': ' + v.verdict}.")
    vp, vm = _T + "verify.predicted.", _T + "verify.measured."
    text = f"**Held-out check ({where}).** From the smaller proxy sizes alone the trend predicted "
    if p.get("reversal_depth") is not None:
        text += f"K* ≈ {w.num(vp + 'reversal_depth', '.1f')}{w.ci(vp + 'reversal_depth_ci', '.1f')}"
    if p.get("slope") is not None:
        text += ("; " if p.get("reversal_depth") is not None else "") + (
            f"s = {w.num(vp + 'slope')}{w.ci(vp + 'slope_ci')}")
    if p.get("depth_to_plan_for") is not None:
        text += f" and a depth to plan for of {w.num(vp + 'depth_to_plan_for', 'd')}"
    text += f"{when}. Trained afterwards, it measured "
    if m.get("reversal_depth") is not None:
        text += f"K* ≈ {w.num(vm + 'reversal_depth', '.1f')}{w.ci(vm + 'reversal_depth_ci', '.1f')}; "
    else:
        text += f"no reversal within its depths ({(m.get('reversal_status') or 'none').replace('_', ' ')}); "
    text += f"s = {w.num(vm + 'slope')}{w.ci(vm + 'slope_ci')}"
    if m.get("depth_to_plan_for") is not None:
        text += f"; depth to plan for {w.num(vm + 'depth_to_plan_for', 'd')}"
    text += ". "
    if v.inside is True:
        text += ("The measured K* lies inside the prediction interval widened by the measurement's own "
                 f"spread ({w.interval(_T + 'verify.compared_interval.reversal_depth', '.1f')}): the carry "
                 "along size held once. One check is not a guarantee.")
    elif v.inside is False:
        text += ("**The measured K* lies OUTSIDE the prediction interval**, even widened by the "
                 f"measurement's own spread ({w.interval(_T + 'verify.compared_interval.reversal_depth', '.1f')}): "
                 "the carry along size failed its one check, so do not trust a target depth carried the same way.")
    else:
        text += f"K* is not compared ({v.verdict or 'no interval on both sides'})."
    if given(v.slope_inside):
        text += (" The measured slope lies " + ("inside" if v.slope_inside else "outside")
                 + " its widened prediction interval.")
    if given(v.depth_inside_range) and p.get("depth_to_plan_for_range"):
        text += (f" The measured depth to plan for lies {'inside' if v.depth_inside_range else '**outside**'} "
                 f"the predicted range ({w.interval(vp + 'depth_to_plan_for_range', 'd')}).")
    return text


def _target_words(inp: ReportInputs, t: Transfer, w: Words) -> str:
    tg = t.target
    where = _size(tg.width, tg.train_rows)
    cfg_t = getattr(inp.config, "target", None)
    if cfg_t is not None and getattr(cfg_t, "n_params", None):
        where += f", about {cfg_t.n_params:,} parameters"
    factors = tg.extrapolation_factor or {}
    far = [a for a, f in factors.items() if f > FAR_FACTOR]
    head = f"**For the target job ({where}; {_factor_words(factors)}):** "
    p = _T + "target."
    if not given(tg.depth_to_plan_for):
        return head + (f"no target depth is given. {t.reason or 'The trend along size does not support one'}"
                       ". Plan from the proxy answer below only as far as the target resembles the proxies, "
                       "or sweep more proxy sizes.")
    if given(tg.plan_settled) and not tg.plan_settled:
        text = head + (f"**no single depth**: the data allow {w.interval(p + 'depth_to_plan_for_range', 'd')} hidden "
                       f"layers (carried figure {w.num(p + 'depth_to_plan_for', 'd')}), because at every proxy size the "
                       "total compute is nearly flat over depth, so each size's own depth to plan for is loose")
    else:
        text = head + f"plan for **{w.num(p + 'depth_to_plan_for', 'd')} hidden layers**"
        if tg.depth_to_plan_for_range:
            text += f" (range {w.interval(p + 'depth_to_plan_for_range', 'd')})"
    text += (f"; carried along size from the proxies, the depth of fewest updates K* ≈ "
             f"{w.num(p + 'reversal_depth', '.1f')}{w.ci(p + 'reversal_depth_ci', '.1f')}")
    if given(tg.slope):
        text += f", s = {w.num(p + 'slope')}{w.ci(p + 'slope_ci')}"
    text += " (95 % prediction intervals)."
    if given(tg.plan_basis):
        text += f" The depth to plan for is {tg.plan_basis}."
    if tg.past_swept_depths:
        text += (f" **Beyond the swept depths:** these figures reach past the deepest depth the proxies swept "
                 f"({w.num(p + 'deepest_swept_depth', 'd')}), where they rest on the carried law alone; sweep the "
                 "proxies deeper before relying on them.")
    if far:
        text += (f" **Strong warning:** past {FAR_FACTOR:g}x the largest proxy this figure is a guess, not a "
                 "plan; sweep larger proxies before relying on it.")
    elif any(f > SHORT_FACTOR for f in factors.values()):
        text += f" Past {SHORT_FACTOR:g}x the largest proxy the carry is long; treat the range as the answer."
    head_size = t.headline_size or {}
    text += (f" The proxy-only answer below is that of the largest proxy measured "
             f"({_size(head_size.get('width'), head_size.get('train_rows')) or 'its size'}) on its own.")
    return text


def lead_blocks(inp: ReportInputs, w: Words) -> list[Block]:
    """Paragraphs that open the answer: the held-out check (first), then the target's depth."""
    t = _transfer(inp.result)
    out: list[Block] = []
    if t is None:
        return out
    if t.verify:
        out.append(("p", _check_words(t.verify, w), "caution" if t.verify.inside is False else "answer"))
    if t.target:
        out.append(("p", _target_words(inp, t, w), "answer"))
    return out


def _size_rows(t: Transfer, w: Words) -> list[list[str]]:
    rows = []
    for i, r in enumerate(t.sizes):         # each size a plain block
        p = f"{_T}sizes.{i}."
        rows.append([_size(r.get("width"), r.get("train_rows")), "fit", str(r["n_runs"]),
                     (f"{w.num(p + 'reversal_depth', '.1f')} ({w.interval(p + 'reversal_depth_ci', '.1f')})"
                      if r.get("reversal_depth") else r["reversal_status"].replace("_", " ")),
                     f"{w.num(p + 'slope')} ({w.interval(p + 'slope_ci')})" if r.get("slope") is not None else "n/a",
                     w.num(p + "depth_to_plan_for", "d") if r.get("depth_to_plan_for") is not None else "n/a"])
    for z in t.skipped_sizes or []:
        rows.append([_size(z.get("width"), z.get("train_rows")), "not fitted", "", z["reason"], "", ""])
    v = t.verify
    if v and v.measured:
        m, p = v.measured, _T + "verify.measured."
        rows.append([_size(v.width, v.train_rows), "held out", str(m["n_runs"]),
                     (f"{w.num(p + 'reversal_depth', '.1f')} ({w.interval(p + 'reversal_depth_ci', '.1f')})"
                      if m.get("reversal_depth") else (m.get("reversal_status") or "none").replace("_", " ")),
                     f"{w.num(p + 'slope')} ({w.interval(p + 'slope_ci')})" if m.get("slope") is not None else "n/a",
                     w.num(p + "depth_to_plan_for", "d") if m.get("depth_to_plan_for") is not None else "n/a"])
    return rows


def _law_words(t: Transfer, w: Words) -> str:
    parts = []
    for key, what, fmt in (("reversal_depth_law", "K* ∝", "exp"), ("slope_law", "s changes by", "lin")):
        law = getattr(t, key)
        if not law:
            continue
        for a, e in law["by_axis"].items():
            p = f"{_T}{key}.by_axis.{a}."
            if fmt == "exp":
                parts.append(f"K* ∝ {a.replace('_', ' ')}^{{{w.num(p + 'exponent')}}}{w.ci(p + 'ci')}")
            else:
                parts.append(f"s changes by {w.num(p + 'exponent')}{w.ci(p + 'ci')} per unit of log "
                             f"{a.replace('_', ' ')}")
    status = t.status
    text = "The trend along size, fitted by weighted least squares on the per-size estimates: " + (
        "; ".join(parts) if parts else "not fitted") + "."
    if status == "not_supported":
        text += f" **Transfer is not supported by these sizes** ({t.reason if given(t.reason) else None}); no target depth is given."
    if t.warning:
        text += f" {t.warning[0].upper()}{t.warning[1:]}."
    return text


def section_blocks(inp: ReportInputs, w: Words) -> list[Block]:
    """The words of the section "From proxies to the target" (the figure is placed before them)."""
    t = _transfer(inp.result)
    if t is None or t.status == "single_size":
        return []
    header = ["proxy size", "role", "runs", "K* (95 % interval)", "s (95 % interval)", "depth to plan for"]
    out: list[Block] = [("table", header, _size_rows(t, w), "numbers"), ("p", _law_words(t, w))]
    out.append(("p", "What this trend depends on: the parameterisation (standard here; under width-scaled "
                     "parameterisations learning rates carry across width, Yang et al. 2022, \"Tensor "
                     "Programs V\", arXiv:2203.03466), the learning-rate policy (here each size's primary "
                     "learning-rate curve), the optimiser and the convergence rule. A trend measured under one policy "
                     "does not carry to another. Sizes of fewer rows train on a stratified, seeded draw of the "
                     "training split, each smaller draw inside the larger ones.", "small"))
    return out
