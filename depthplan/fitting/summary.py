"""The sentences of a fit: fit.json's warnings and the summary `depthplan fit` prints.

`_group_warnings` writes the warnings of one learning-rate group from its
assembled fit; `format_summary` turns a whole fit.json dict into the short
plain text of the CLI. Plain Python, no torch.
"""
from __future__ import annotations

from typing import Any, Sequence

from ..fit_record import FitResult, Planning, Reversal, Transfer
from .cost import cost_label
from .depthlaw import RunArrays

# ---------------------------------------------------------------- wording

def _plural(n: int, noun: str) -> str:
    return f"{n} {noun}{'s' * (n != 1)}"


def _describe(group: dict[str, Any]) -> str:
    if group["lr_mode"] == "tuned":
        return "learning rate tuned per depth"
    if group["learning_rate"] is None:
        return "learning rate not recorded"
    return f"fixed learning rate {group['learning_rate']:g}"


# ---------------------------------------------------------------- warnings of one group

def _group_warnings(fit: dict[str, Any], d: RunArrays, eval_every: int | None) -> list[str]:
    out: list[str] = []
    depths, rows = fit["depths_swept"], fit["per_depth"]
    pl, rev, plan = fit["power_law"], fit["reversal"], fit["planning"]
    if len(depths) < 5:
        out.append(f"only {len(depths)} depths swept; a depth law wants five or more")
    if len(pl["depths_used"]) < 3:
        out.append(f"the slope rests on {len(pl['depths_used'])} depths only")
    fewest = min(r["converged"] + r["censored"] for r in rows)
    if fewest < 3:
        out.append(f"as few as {_plural(fewest, 'finished run')} at a depth: intervals "
                   "are rough; use three seeds or more per depth")
    if pl["ci_method"] == "residuals":
        out.append("some depths have a single run: intervals resample residuals, not seeds")
    heavy = [r["depth"] for r in rows if r["censored"] and 2 * r["censored"] >= r["converged"]
             + r["censored"]]
    if heavy:
        out.append(f"heavy censoring at depth {', '.join(map(str, heavy))}: half or more of the "
                   "runs hit the budget; they count as lower bounds, but raise max_updates")
    elif d.C.mean() > 0.25:
        out.append(f"{100 * d.C.mean():.0f} % of the runs hit the budget; raise max_updates")
    n_div = sum(r["diverged"] for r in rows)
    if n_div:
        out.append(f"{_plural(n_div, 'run')} diverged and {'are' if n_div > 1 else 'is'} "
                   "left out of the fit; lower the learning rate")
    if rev["status"] == "observed":
        ci = rev["depth_ci"] or [depths[0], depths[-1]]
        if rev["n_depths_past"] <= 2 or ci[0] < depths[1] or ci[1] > depths[-2]:
            out.append(f"the reversal at K = {rev['depth']:.1f} sits at the edge of the swept "
                       "depths; sweep a few layers deeper to confirm it")
        if rev["smooth_depth"] is None:
            out.append("the smooth two-term model did not fit; the reversal depth is not "
                       "cross-checked")
        elif abs(rev["smooth_depth"] - rev["breakpoint"]) > 1:
            out.append(f"the segmented fit (K = {rev['breakpoint']:.1f}) and the smooth two-term "
                       f"model (K = {rev['smooth_depth']:.1f}) disagree by more than one layer")
    if rev["rise_suspected"]:
        out.append(f"a rise past K = {fit['power_law']['depths_used'][-1]} is hinted but not "
                   "established; sweep deeper and add seeds before trusting a reversal")
    finished = [(r["median"], r["depth"]) for r in rows if r["median"] is not None]
    if eval_every and finished:
        t_low, k_low = min(finished)
        if eval_every > t_low / 20:
            out.append(f"evaluation every {eval_every} updates is coarse against T = {t_low:g} at "
                       f"depth {k_low} (more than T/20); evaluate more often")
    for key, label in (("last_depth_worth_adding", "last depth worth adding"),
                       ("compute_optimal_depth", "compute-optimal depth")):
        fig = plan[key]
        if fig["depth"] is not None and fig["extrapolated"]:
            out.append(f"the {label} ({fig['depth']}) lies outside the swept depths "
                       f"{depths[0]}-{depths[-1]}: it is extrapolated from the fitted law")
    without = pl.get("without_shallowest")
    if without and pl["slope"] < without["slope_ci"][0]:
        out.append(f"the shallowest depth steepens the slope ({pl['slope']:.2f} with it, "
                   f"{without['slope']:.2f} without); it may be capacity-limited")
    if not pl["converged"]:
        out.append("the censored power-law fit did not converge; raise max_updates")
    if pl["n_boot_failed"] > 0.05 * fit["bootstrap"]["n_boot"]:
        out.append(f"{pl['n_boot_failed']} bootstrap resamples failed to fit")
    return out


def _accuracy_warnings(fit: dict[str, Any]) -> list[str]:
    """The accuracy guard's warning (first: it can overturn the depth to plan for), or none."""
    check = fit["planning"].get("accuracy_check") or {}
    return [check["note"]] if check.get("clearly_below") else []


# ---------------------------------------------------------------- models, gaps, stuck runs

MODEL_LABELS = {"power_law": "single power law", "saturating": "saturating law (plateau)",
                "segmented": "broken stick", "two_term": "two-term model"}


def _depth_list(depths: Sequence[int]) -> str:
    return f"depth{'s' * (len(depths) != 1)} {', '.join(map(str, depths))}"


UNSETTLED = "the answer is not pinned down: "


def _unresolved(plan: dict[str, Any]) -> str:
    """One sentence when the answer is not pinned down by the swept depths or the models, else ""."""
    reasons = _unsettled_reasons(plan)
    return UNSETTLED + reasons if reasons else ""


def _unsettled_reasons(plan: dict[str, Any]) -> str:
    """Why the answer is not pinned down (gaps, disagreeing models), the range and the depths to sweep
    next; "" when it is pinned down."""
    parts = [f"the {g['figure']} ({g['value']:.3g}) lies between the swept depths "
             f"{g['between'][0]} and {g['between'][1]}, where nothing was swept"
             for g in plan.get("gaps") or []]
    parts += [f"the models disagree on the {m['figure']} by more than one layer ("
              + ", ".join(f"{MODEL_LABELS.get(k, k)} {v:.3g}" for k, v in m["by_model"].items())
              + ")" for m in plan.get("models_disagree") or []]
    if not parts:
        return ""
    text = "; ".join(parts)
    rng = plan.get("recommended_range")
    if rng:
        text += f"; plan for a depth between {rng[0]} and {rng[1]}"
    nxt = plan.get("next_depths")
    return text + (f"; sweep {_depth_list(nxt)} next" if nxt else "")


def _stuck_sentences(fit: dict[str, Any]) -> list[str]:
    from .stuck import STUCK_FACTOR
    rows = {r["depth"]: r for r in fit["per_depth"]}
    out = []
    for k in sorted({s["depth"] for s in fit.get("stuck_runs") or []}):
        at = [s for s in fit["stuck_runs"] if s["depth"] == k]
        n = rows[k]["converged"] + rows[k]["censored"]
        seeds = ", ".join(f"seed {s['seed']} at {s['budget']:g} updates" for s in at)
        out.append(f"a {k}-layer net got stuck {len(at)} of {n} times ({seeds}: censored at "
                   f"over {STUCK_FACTOR:g} times the slowest converged run of that depth); stuck "
                   "runs are left out of the depth law and counted in the per-depth stuck rate")
    return out


def caveat_sentences(fit: dict[str, Any]) -> list[str]:
    """The sentences that must come before any figure: an answer not pinned down, stuck runs.

    For the report's opening; empty when neither applies (or for fits written before
    these fields existed).
    """
    if "models" not in fit:
        return []
    first = _unresolved(fit["planning"])
    return ([first] if first else []) + _stuck_sentences(fit)


def _model_warnings(fit: dict[str, Any]) -> list[str]:
    """The warnings that lead: an answer not pinned down, stuck runs, models that miss depths."""
    out = caveat_sentences(fit)
    models = fit["models"]
    chosen = next(c for c in models["candidates"] if c["model"] == models["chosen"])
    label = MODEL_LABELS.get(chosen["model"], chosen["model"])
    lof = chosen["lack_of_fit"]
    if lof["missed_depths"]:
        out.append(f"the chosen {label} misses {_depth_list(lof['missed_depths'])} (lack-of-fit "
                   f"p = {lof['p_value']:.2g}); no candidate model follows the medians there, so "
                   "read its figures as rough")
    pl = fit["power_law"]
    single = pl.get("lack_of_fit") or {}
    if single.get("missed_depths"):
        used = pl["depths_used"]
        text = (f"the single power law misses {_depth_list(single['missed_depths'])} (lack-of-fit "
                f"p = {single['p_value']:.2g}): T is not one power of K over depths "
                f"{used[0]}-{used[-1]}, so the slope s summarises it poorly")
        if chosen["model"] != "power_law":
            text += f"; the {label} is preferred (Akaike weight {chosen['weight']:.2f})"
        out.append(text)
    return out


# ---------------------------------------------------------------- summary text

def headline_lines(fit: FitResult | dict[str, Any]) -> list[str]:
    """The depth to plan for with its basis and range, the accuracy guard, the cost basis and the
    learning-rate caution: the first lines of `depthplan fit`, also printed by `run` and `demo`."""
    r = fit if isinstance(fit, FitResult) else FitResult.from_dict(fit)
    plan = r.planning
    lines = []
    reasons = _unsettled_reasons(plan.to_dict())
    t = r.transfer
    if t and t.target:
        lines.append(target_line(t.target))
    if t and t.verify and t.verify.verdict:
        lines.append(f"Held-out check: {t.verify.verdict}.")
    if reasons:
        lines.append(f"Not settled: {reasons}.")
    head = (t.headline_size or {}) if t else {}
    proxy = f"largest proxy, {_size_words(head.get('width'), head.get('train_rows'))}; " if head else ""
    if plan.recommended_depth is not None:
        rng = plan.recommended_range
        lines.append(f"Recommended depth: {_plural(plan.recommended_depth, 'layer')}"
                     + (" [extrapolated]" if plan.recommended_extrapolated else "")
                     + f" ({proxy}from the {plan.recommended_basis})"
                     + (f"; the data allow {rng[0]} to {rng[1]}" if rng else _recommended_range(plan)) + ".")
    else:
        lines.append(f"No depth to plan for could be derived ({plan.recommended_basis}).")
    check = plan.accuracy_check or {}
    if check.get("clearly_below"):
        lines.append(f"Accuracy warning: {check['note']}.")
    opt = plan.compute_optimal_depth
    basis = plan.cost_basis or None
    if basis not in (None, "none") and opt.note and r.depth_gain:
        lines.append(f"Cost per update ({basis} basis): {opt.note}.")
    rate = (r.rate_effect or {}) if not r.lr_interaction else {}
    if rate:
        lines.append(f"Learning rate: one fixed rate served every depth ({rate['learning_rate']:g}), "
                     f"so the slope includes the rate effect; {_rate_hint(rate)}")
    return lines


def _recommended_range(plan: Planning) -> str:
    """', 95 % interval a to b' of the figure the recommended depth comes from ('' if none)."""
    for fig, name in ((plan.compute_optimal_depth, "compute-optimal"),
                      (plan.last_depth_worth_adding, "last depth worth adding")):
        if fig.depth == plan.recommended_depth and name in plan.recommended_basis and fig.ci:
            return f"; 95 % interval {fig.ci[0]:.0f} to {fig.ci[1]:.0f} layers"
    return ""


def _rate_hint(rate: dict[str, Any]) -> str:
    from .rates import TUNE_KEY, rate_effect_words
    return f"{rate_effect_words(rate)}. Tune the rate per depth ({TUNE_KEY}) to separate the two."


def _ci_text(ci: Sequence[float] | None, fmt: str = ".2f") -> str:
    return "" if not ci or None in ci else f" (95 % interval {ci[0]:{fmt}} to {ci[1]:{fmt}})"


def format_summary(fit: FitResult | dict[str, Any]) -> str:
    """The short plain-text summary `depthplan fit` prints (from a FitResult or fit.json's dict)."""
    r = fit if isinstance(fit, FitResult) else FitResult.from_dict(fit)
    depths = r.depths_swept
    lines = [f"Fitted {r.n_runs} runs at depths {depths[0]}-{depths[-1]}"
             f" ({_describe(r.group.to_dict())})"
             + (f" from {r.source}" if r.source else "") + "."]
    plan = r.planning
    lines += headline_lines(r)
    lines += _stuck_lines(r) + _law_lines(r) + _model_lines(r) + [_reversal_line(r.reversal)]
    lines += _planning_lines(plan)
    probes = _probe_line(r)
    if probes:
        lines.append(probes)
    lines += _transfer_lines(r.transfer)
    if r.lr_interaction:
        lines.append(f"Several learning-rate groups: the figures above are for the "
                     f"{_describe(r.group.to_dict())}; each group is fitted in by_learning_rate.")
    if r.warnings:
        lines.append("Warnings:")
        lines.extend(f"  - {w}" for w in r.warnings)
    lines.append("These figures come from small proxy networks; the depth law of the big run "
                 "may differ, so check a depth or two at full scale before committing.")
    return "\n".join(lines)


def _stuck_lines(r: FitResult) -> list[str]:
    if not r.stuck_runs:
        return []
    parts = []
    for row in r.per_depth:
        if row.stuck:
            seeds = ", ".join(str(s.seed) for s in r.stuck_runs if s.depth == row.depth)
            parts.append(f"a {row.depth}-layer net got stuck {row.stuck} of "
                         f"{row.converged + row.censored} times (seed{'s' * (row.stuck > 1)} {seeds})")
    return [f"Stuck runs: {'; '.join(parts)}. They are left out of the depth law, not counted "
            "as slow runs."]


def _model_lines(r: FitResult) -> list[str]:
    m = r.models
    if not m:
        return []
    ranked = sorted(m.candidates, key=lambda c: -c.weight)
    return ["Models by AICc (Akaike weights): "
            + ", ".join(f"{MODEL_LABELS.get(c.model, c.model)} {c.weight:.2f}" for c in ranked)
            + f"; the figures below use the {MODEL_LABELS.get(m.chosen, m.chosen)}, their "
            "intervals refit and reselect the model on every bootstrap replicate."]


def _law_lines(r: FitResult) -> list[str]:
    pl = r.power_law
    used = pl.depths_used
    lines = [f"Depth law T ~ K^s over depths {used[0]}-{used[-1]}: s = {pl.slope:.2f} "
             f"+/- {pl.slope_se:.2f}{_ci_text(pl.slope_ci)}, R^2 = {pl.r2:.2f}"
             + (f", {pl.n_censored} censored (used as lower bounds)" if pl.n_censored else "") + "."]
    if pl.without_shallowest:
        lines.append(f"Without the shallowest depth: s = {pl.without_shallowest.slope:.2f}"
                     f"{_ci_text(pl.without_shallowest.slope_ci)}.")
    if r.depth_gain:
        lines.append(f"Alpha = 1/(1 - s) = {pl.alpha:.2f}{_ci_text(pl.alpha_ci)}.")
    else:
        lines.append("Depth gives no gain here (s >= 0 or its interval includes 0); "
                     "no alpha is reported.")
    return lines


def _reversal_line(rev: Reversal) -> str:
    if not rev.observed:
        return f"Reversal: {rev.status.replace('_', ' ')}: {rev.note}."
    return (f"Reversal observed at K = {rev.depth:.1f}{_ci_text(rev.depth_ci, '.1f')}"
            f"; rising slope {rev.rising_slope:.2f}"
            + (f"; smooth model minimum at K = {rev.smooth_depth:.1f}"
               if rev.smooth_depth is not None else "") + ".")


def _planning_lines(plan: Planning) -> list[str]:
    lines = []
    worth, opt = plan.last_depth_worth_adding, plan.compute_optimal_depth
    if worth.depth is not None:
        lines.append(f"Last depth worth adding (next layer saves under "
                     f"{100 * plan.save_fraction:g} %): {worth.depth}{_ci_text(worth.ci, '.0f')}"
                     + (" [extrapolated]" if worth.extrapolated else "") + ".")
    if opt.depth is not None:
        lines.append(f"Compute-optimal depth ({cost_label(opt.cost_model)}): {opt.depth}"
                     f"{_ci_text(opt.ci, '.0f')}" + (" [extrapolated]" if opt.extrapolated else "") + ".")
    elif opt.note:
        lines.append(f"Compute-optimal depth: not given ({opt.note}).")
    return lines


def _size_words(width: Any, rows: Any) -> str:
    return ", ".join(p for p in (f"width {width}" if width else "", f"{rows} training rows" if rows else "") if p)


def _transfer_lines(t: Transfer | None) -> list[str]:
    """Per-size K* and s, the trend's exponents, and the target's figures with their extrapolation."""
    if not t or t.status == "single_size":
        return []
    sizes = "; ".join(f"{_size_words(s['width'], s['train_rows'])}: K* "
                      + (f"{s['reversal_depth']:.1f}" if s["reversal_depth"] else s["reversal_status"].replace("_", " "))
                      + f", s {s['slope']:.2f}" for s in t.sizes)
    lines = [f"Proxy sizes ({len(t.sizes)}): {sizes}."]
    law = t.reversal_depth_law
    if law:
        lines.append("K* moves with size as " + ", ".join(
            f"{a}^{e['exponent']:.2f}{_ci_text(e['ci'])}" for a, e in law["by_axis"].items()) + ".")
    if t.status != "supported":
        lines.append(f"Transfer to a bigger job: not supported by the data ({t.reason}).")
    return lines          # the target's line leads the summary (`headline_lines`)


def target_line(tg: Any) -> str:
    """'Target (width 128; 4.0x ...): plan for N layers (range a to b) ...; K* ...': one line."""
    where = _size_words(tg.width, tg.train_rows)
    factor = ", ".join(f"{v:.1f}x the largest proxy's {a}" + (" [a guess, past 8x]" if v > 8 else "")
                       for a, v in tg.extrapolation_factor.items())
    slope = f", s {tg.slope:.2f}{_ci_text(tg.slope_ci)}" if tg.slope is not None else ""
    if tg.depth_to_plan_for is None:
        return f"Target ({where}; {factor}): no target depth{slope}."
    span = tg.depth_to_plan_for_range
    if tg.plan_settled is False and span:
        plan = f"no single depth: the data allow {span[0]} to {span[1]} layers"
    else:
        plan = f"plan for {_plural(tg.depth_to_plan_for, 'layer')}" + (f" (range {span[0]} to {span[1]})" if span else "")
    past = (f" [past the deepest swept depth, {tg.deepest_swept_depth}]" if tg.past_swept_depths else "")
    return (f"Target ({where}; {factor}): {plan}; K* {tg.reversal_depth:.1f}"
            f"{_ci_text(tg.reversal_depth_ci, '.1f')}{past}{slope}.")


#: How each verdict of the late-window check reads (fit.json `diffusion.late_window.verdict`).
VERDICT_WORDS = {"agree": "agree (the intervals overlap)",
                 "disagree": "disagree (the intervals do not overlap)",
                 "not_enough_points": "not comparable: fewer than 3 probes in the last half of every run",
                 "no_alpha": "not comparable: the depth law gives no alpha"}


def _late_window_text(diff: Any) -> str:
    """'late-phase displacement exponent (steps T/2 to T) 0.52 (95 % interval ...) against alpha ...'."""
    late = diff.late_window
    if not late:        # a file written before the late window existed
        alpha = (f"against alpha {diff.alpha:.2f} from the depth law"
                 if diff.alpha is not None else "(no alpha from the depth law to compare)")
        return f"late-phase displacement exponent {diff.late_exponent_median:.2f} {alpha}"
    exponent = ("not measured" if late.exponent is None
                else f"{late.exponent:.2f}{_ci_text(late.exponent_ci)}")
    alpha = ("no alpha from the depth law" if late.alpha is None
             else f"alpha {late.alpha:.2f}{_ci_text(late.alpha_ci)} from the depth law")
    return (f"displacement exponent over the last half of each run (T/2 to T) {exponent}, "
            f"against {alpha}: {VERDICT_WORDS.get(late.verdict, late.verdict)}")


def _probe_line(r: FitResult) -> str:
    diff = r.diffusion
    if not diff or (diff.late_exponent_median is None and not diff.late_window):
        return ""
    text = f"Probes: {_late_window_text(diff)}"
    if diff.snr_drop_db_median is not None:
        text += f"; gradient SNR falls {diff.snr_drop_db_median:.0f} dB"
    if diff.transition_step_median is not None:
        text += f" around step {diff.transition_step_median:.0f}"
    return text + "."
