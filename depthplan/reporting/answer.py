"""The report's opening words: the depth to plan for and why, how sure, what was swept, the caution.

Numbers taken from fit.json are written through `Words` (see
`depthplan.report_markup`), so both renderings show the fit's own values and
the HTML tags each with its key; numbers computed here from the runs are
formatted directly.
"""
from __future__ import annotations

import math
import statistics
from pathlib import Path
from typing import Any

import numpy as np

from ..fitting.planning import total_cost_curve
from . import figures as F
from .inputs import ReportInputs
from .markup import EXTRAPOLATED, Block, Words

_FLAT = 0.10          # "nearly flat": fitted total compute within this fraction of its minimum
def badge(flag: Any) -> str:
    return EXTRAPOLATED if flag else ""


def save_percent(w: Words) -> str:
    return w.num("planning.save_fraction", "g@100")


# ---------------------------------------------------------------- the answer

def _why(fit: dict[str, Any], w: Words) -> str:
    plan, rev = fit["planning"], fit["reversal"]
    rec = plan["recommended_depth"]
    opt, worth = plan["compute_optimal_depth"]["depth"], plan["last_depth_worth_adding"]["depth"]
    if rec is None:
        return "No depth could be derived from these runs; see the warnings."
    if not fit["depth_gain"]:
        return (f"Depth gives no gain over the swept depths: the fitted slope s = "
                f"{w.num('power_law.slope')} is not clearly below zero, so added layers do not cut "
                "the number of updates, and the shallowest depth swept is the cheapest choice.")
    past = (f" Past the reversal depth (K* ≈ {w.num('reversal.depth', '.1f')}) each added layer "
            "costs more updates, not fewer." if rev["status"] == "observed" else "")
    if rec == opt and rec == worth:
        return "It is both the compute-optimal depth and the last depth worth adding." + past
    if rec == opt:
        return ("It is the compute-optimal depth: there the fitted number of updates times the "
                "measured cost of one update is lowest"
                + (f", and it comes before the last depth worth adding (K = "
                   f"{w.num('planning.last_depth_worth_adding.depth', 'd')})." if worth else ".") + past)
    if rec == worth:
        return (f"It is the last depth worth adding: past it the next layer saves less than "
                f"{save_percent(w)} % of the updates"
                + (f", and it comes before the compute-optimal depth (K = "
                   f"{w.num('planning.compute_optimal_depth.depth', 'd')})." if opt else ".") + past)
    if rev.get("rise_suspected"):
        return ("It is the swept depth with the fewest updates: T turns up past it, and although "
                "that rise is not established, the figures of the fitted law (which would go "
                "deeper) are capped there.")
    return f"It is the {plan['recommended_basis']}."


def _fewest_updates(fit: dict[str, Any], w: Words) -> str:
    rev = fit["reversal"]
    head = "**Fewest updates (iteration-optimal):** "
    if rev["status"] == "observed":
        text = (f"K* ≈ {w.num('reversal.depth', '.1f')}{w.ci('reversal.depth_ci', '.1f')}. Below it "
                f"T falls as K^{{{w.num('reversal.falling_slope')}}}; past it T rises as "
                f"K^{{{w.num('reversal.rising_slope')}}}{w.ci('reversal.rising_slope_ci')}.")
        if rev.get("smooth_depth") is not None:
            text += (f" A smooth two-term model, as a cross-check, puts the minimum at K ≈ "
                     f"{w.num('reversal.smooth_depth', '.1f')}.")
        return head + text
    if rev["status"] == "none":
        return head + "not defined: depth gives no gain here."
    if rev.get("rise_suspected"):
        return head + (f"T is lowest at K = {w.num('power_law.depths_used.-1', 'd')} of the depths "
                       f"swept and turns up past it, but the rise is not established "
                       f"({rev['note']}); add seeds and deeper depths before trusting it.")
    return head + (f"not inside the sweep: T still falls at the deepest depth swept (K = "
                   f"{w.num('depths_swept.-1', 'd')}), so the minimum, if there is one, lies "
                   "deeper. Sweep deeper to find it.")


def _compute_optimal(fit: dict[str, Any], w: Words) -> str:
    opt = fit["planning"]["compute_optimal_depth"]
    head = "**Fewest seconds of compute (compute-optimal):** "
    if opt.get("cost_model") is None:
        return head + "not given: no seconds per update were measured."
    p = "planning.compute_optimal_depth."
    cost = ("one update took about "
            + (f"{w.num(p + 'cost_model.seconds_intercept', '.3g@1e3')} ms + "
               if opt["cost_model"]["seconds_intercept"] > 0 else "")
            + f"{w.num(p + 'cost_model.seconds_per_layer', '.3g@1e3')} ms per layer")
    if opt["depth"] is None:
        return head + f"not given: {opt.get('note') or 'no minimum within the search range'} ({cost})."
    return head + (f"K = {w.num(p + 'depth', 'd')}{w.ci(p + 'ci', 'd')}{badge(opt['extrapolated'])}, "
                   f"where the fitted updates times the seconds per update are lowest ({cost}).")


def _worth_adding(fit: dict[str, Any], w: Words) -> str:
    fig = fit["planning"]["last_depth_worth_adding"]
    head = "**Last depth worth adding:** "
    if fig["depth"] is None:
        return head + (f"not found: under the fitted law every added layer keeps saving at least "
                       f"{save_percent(w)} % of the updates over the whole search range.")
    p = "planning.last_depth_worth_adding."
    return head + (f"K = {w.num(p + 'depth', 'd')}{w.ci(p + 'ci', 'd')}{badge(fig['extrapolated'])}: "
                   f"from there the next layer saves less than {save_percent(w)} % of the updates.")


def flat_cost_range(fit: dict[str, Any]) -> tuple[int, int] | None:
    """Whole depths around the minimum where the fitted total compute is within `_FLAT` of it."""
    curve = total_cost_curve(fit)
    if curve is None or not np.isfinite(curve[1]).all():
        return None
    k, cost = curve
    ks = np.arange(math.ceil(k[0]), math.floor(k[-1]) + 1)
    if len(ks) < 2:
        return None
    total = np.exp(np.interp(np.log(ks), np.log(k), np.log(cost)))
    i = int(np.argmin(total))
    near = total <= (1 + _FLAT) * total[i]
    lo, hi = i, i
    while lo > 0 and near[lo - 1]:
        lo -= 1
    while hi < len(ks) - 1 and near[hi + 1]:
        hi += 1
    return int(ks[lo]), int(ks[hi])


def _flat_words(fit: dict[str, Any]) -> str:
    span = flat_cost_range(fit)
    if span is None or span[1] - span[0] < 2 or fit["planning"]["compute_optimal_depth"]["depth"] is None:
        return ""
    return (f"The total compute is nearly flat near its minimum: by the fitted law it stays within "
            f"{100 * _FLAT:.0f} % of the lowest value from K = {span[0]} to K = {span[1]}, so any "
            "depth in that range costs about the same compute; choose among them by what else "
            "matters (memory, latency, the rest of the architecture).")


def _how_sure(fit: dict[str, Any], w: Words) -> str:
    pl = fit["power_law"]
    text = (f"**How sure.** Over depths {w.num('power_law.depths_used.0', 'd')} to "
            f"{w.num('power_law.depths_used.-1', 'd')} the law T ∝ K^{{s}} fits with s = "
            f"{w.num('power_law.slope')}{w.ci('power_law.slope_ci')}, standard error "
            f"{w.num('power_law.slope_se')}")
    if pl.get("alpha") is not None:
        text += f", so α = 1/(1 − s) = {w.num('power_law.alpha')}{w.ci('power_law.alpha_ci')}"
    text += f"; R² = {w.num('power_law.r2')}."
    if pl.get("alpha") is not None:
        text += " (Free diffusion, α = 1/2, gives s = −1: doubling the depth halves the updates.)"
    how = ("of the seeds within each depth" if fit["bootstrap"]["method"] == "seeds_within_depth"
           else "of the fit's residuals, since some depth has a single run")
    text += (f" Intervals are 95 % percentile intervals from {w.num('bootstrap.n_boot', 'd')} "
             f"bootstrap resamples {how}.")
    if pl.get("without_shallowest"):
        text += (f" Leaving out the shallowest depth gives s = "
                 f"{w.num('power_law.without_shallowest.slope')}"
                 f"{w.ci('power_law.without_shallowest.slope_ci')}.")
    if pl.get("n_censored"):
        one = pl["n_censored"] == 1
        text += (f" {w.num('power_law.n_censored', 'd')} censored run{'' if one else 's'} "
                 f"count{'s' if one else ''} as {'a lower bound' if one else 'lower bounds'} "
                 "(a censored likelihood), not as values.")
    return text


def _dataset_words(cfg: Any) -> str:
    d = cfg.data
    if d.source == "synthetic":
        return (f"our synthetic scenario ({d.n_samples:,} samples, {d.n_features} noisy features "
                f"folded from {d.n_latent} latent factors, {d.n_classes} classes)")
    if d.source in ("digits", "iris", "wine", "breast_cancer"):
        return f"scikit-learn's {d.source.replace('_', ' ')} dataset"
    return f"the {d.source.upper()} file `{Path(d.path or '').name}`"


_INIT_WORDS = {"he": "He", "kaiming": "He", "xavier": "Xavier", "glorot": "Xavier",
               "orthogonal": "orthogonal", "default": "PyTorch's default"}


def _criterion_words(cfg: Any) -> str:
    c = cfg.train.converge_when
    parts = ([f"the training loss is below {c.train_loss_below:g}"] if c.train_loss_below is not None else []) \
        + ([f"training accuracy is at least {100 * c.train_accuracy_at_least:g} %"]
           if c.train_accuracy_at_least is not None else []) \
        + ([f"validation accuracy is at least {100 * c.validation_accuracy_at_least:g} %"]
           if c.validation_accuracy_at_least is not None else [])
    return " and ".join(parts) or "the stopping rule holds"


def network_words(model: Any) -> str:
    """The swept network in words, by family (depth K counts the hidden layers or blocks)."""
    width = model.width if isinstance(model.width, int) else "/".join(map(str, model.width))
    kind = f"{model.activation}, {_INIT_WORDS.get(model.init, model.init)} initialisation"
    family = getattr(model, "family_name", "mlp")
    if family == "residual":
        branch = "each branch scaled by 1/sqrt(K)" if model.branch_scale == "depth" else "branch multiplier 1"
        norm = "LayerNorm before the activation" if model.norm == "layer" else "no normalisation"
        return (f"a residual network of width {width}: an input projection, K one-layer pre-activation blocks "
                f"({branch}, {norm}) and a linear readout ({kind})")
    if family == "conv":
        return (f"a convolutional network of K 3x3 blocks with {model.conv_channels} channels, global average "
                f"pooling and a linear readout ({kind})")
    if family == "factory":
        return f"the user's own module from `{model.factory}` (options {model.options or {}})"
    return f"an MLP of width {width} ({kind})"


def _rate_words(cfg: Any) -> str:
    t = cfg.train
    fixed = ", ".join(f"{lr:g}" for lr in t.learning_rate)
    if t.tune is not None:
        text = (f"the learning rate tuned per depth ({t.tune.trials} trials between {t.tune.low:g} "
                f"and {t.tune.high:g})")
        return text + (f", and the fixed rate{'s' * (len(t.learning_rate) > 1)} {fixed} beside it"
                       if t.learning_rate else "")
    if len(t.learning_rate) == 1:
        return f"learning rate {fixed} at every depth"
    return f"learning rates {fixed} (one curve each)"


def _what_was_swept(inp: ReportInputs) -> str:
    fit = inp.fit
    depths = ", ".join(str(k) for k in fit["depths_swept"])
    seeds = sorted({row["runs"] for row in fit["per_depth"]})
    per = f"{seeds[0]}" if len(seeds) == 1 else f"{seeds[0]} to {seeds[-1]}"
    n_all = len([r for r in inp.runs if r.lr_mode != "tuning"])
    runs_words = f"{fit['n_runs']} runs" + (
        f" with the {F.group_label(fit['group'])} ({n_all} in all)" if n_all > fit["n_runs"] else "")
    if inp.kind == "table":
        return (f"**What was measured.** {fit['n_runs']} rows of the measurements table "
                f"`{inp.path.name}` at depths {depths}, {per} runs per depth. The table does not say how "
                "the jobs were set up, so this report cannot either.")
    cfg = inp.config
    if cfg is None:
        why = "could not be read" if inp.config_text else "is missing"
        return (f"**What was swept.** {runs_words} at depths {depths}, {per} seeds per depth (the "
                f"folder's config.yaml {why}, so the settings are not described).")
    opt = "SGD" if cfg.train.optimizer == "sgd" else cfg.train.optimizer.capitalize()
    return (f"**What was swept.** {runs_words} on {_dataset_words(cfg)}: depths {depths} "
            f"({len(fit['depths_swept'])} depths), {per} seeds per depth. Each network is "
            f"{network_words(cfg.model)} trained with "
            f"{opt}, {_rate_words(cfg)}, batch {cfg.train.batch_size}, at most "
            f"{cfg.train.max_updates:,} updates; a run counts as converged at the first check (every "
            f"{cfg.train.eval_every} updates) at which {_criterion_words(cfg)}.")


def _n_params(inp: ReportInputs) -> str:
    rec = inp.fit["planning"].get("recommended_depth")
    sized = [r for r in inp.primary_runs if r.n_params]
    if not sized or rec is None:
        return ""
    k = min({r.depth for r in sized}, key=lambda d: abs(math.log(d / rec)))
    n = statistics.median(r.n_params for r in sized if r.depth == k)
    return f" (about {n:,.0f} parameters at K = {k})"


def _caution(inp: ReportInputs, w: Words) -> str:
    fit = inp.fit
    if inp.kind == "table":
        text = ("**Read this as a prior, not a guarantee.** These figures come only from the jobs in "
                "the table. If those jobs were smaller than the one being planned, they are proxies, "
                "and advice from small proxies can mislead a costly decision: a full-size network, "
                "its data and its optimiser may follow a different depth law.")
    else:
        text = (f"**Read this as a prior, not a guarantee.** Every figure here comes from small "
                f"proxy networks{_n_params(inp)} trained on a CPU, and advice from small proxies can "
                "mislead a costly decision: the full-size network, its data, its batch size and its "
                "optimiser may follow a different depth law. Before paying for the big run, train "
                "the recommended depth and a depth either side of it at full scale for a short "
                "while and check that their order holds.")
    lo, hi = w.num("depths_swept.0", "d"), w.num("depths_swept.-1", "d")
    far = F.extrapolated_depths(fit)
    if far:
        text += (f" Figures marked {EXTRAPOLATED} lie outside the swept depths {lo} to {hi} and rest "
                 f"on the fitted law alone (here K = {', '.join(map(str, far))}).")
    else:
        text += f" No figure in this report lies outside the swept depths {lo} to {hi}."
    groups = F.fitted_groups(fit)
    if len(groups) == 1 and groups[0]["group"].get("lr_mode") == "fixed" \
            and groups[0]["group"].get("learning_rate") is not None:
        text += (" One learning rate served every depth, and with one rate for every depth, depth "
                 "partly acts as a learning-rate multiplier (T·lr·K stays roughly constant), so "
                 "part of the gain measured here may be a rate effect; a sweep with the rate tuned "
                 "per depth separates the two.")
    return text


def answer_blocks(inp: ReportInputs, w: Words) -> list[Block]:
    """The answer first: the depth to plan for, why, the three figures, how sure, what was swept."""
    fit = inp.fit
    plan = fit["planning"]
    lead = (f"**Plan for {w.num('planning.recommended_depth', 'd')} hidden layers**"
            f"{badge(plan.get('recommended_extrapolated'))}. {_why(fit, w)}")
    if plan["recommended_depth"] is None:
        lead = _why(fit, w)
    blocks: list[Block] = [("h", 2, "The answer", "answer"), ("p", lead, "answer lead"),
                           ("ul", [_fewest_updates(fit, w), _compute_optimal(fit, w),
                                   _worth_adding(fit, w)])]
    flat = _flat_words(fit)
    if flat:
        blocks.append(("p", flat))
    if fit.get("lr_interaction"):
        blocks.append(("p", f"These figures are for the {F.group_label(fit['group'])}; the sweep "
                            "holds other learning-rate groups, compared further down."))
    blocks += [("p", _how_sure(fit, w)), ("p", _what_was_swept(inp)), ("p", _caution(inp, w), "caution")]
    return blocks


def dynamics_words(w: Words) -> str:
    """The probe cross-check in one sentence (or '' without probes)."""
    d = w.get("diffusion")
    if not d or d.get("late_exponent_median") is None:
        return ""
    parts = (("late_exponent_median", ".2f", "Over all probed depths and layers, the late-phase "
              "growth exponent of the displacement has median {}"),
             ("alpha", ".2f", " (α from the depth law: {})"),
             ("snr_drop_db_median", ".1f", "; the gradient SNR falls by a median {} dB"),
             ("transition_step_median", ".0f", ", around step {}"))
    return "".join(text.format(w.num(f"diffusion.{key}", fmt))
                   for key, fmt, text in parts if d.get(key) is not None) + "." + _depth_drop_words(w)


def _depth_drop_words(w: Words) -> str:
    """' Per depth, the drop is a dB at K = 1 and b dB at K = 24. <no-drop note>' (or '')."""
    d = w.get("diffusion") or {}
    rows = [(i, r) for i, r in enumerate(d.get("by_depth") or []) if r.get("snr_drop_db") is not None]
    text = ""
    if len(rows) >= 2:
        (i, first), (j, last) = rows[0], rows[-1]
        text = (f" Per depth, the median SNR drop is {w.num(f'diffusion.by_depth.{i}.snr_drop_db', '.1f')}"
                f" dB at K = {first['depth']} and {w.num(f'diffusion.by_depth.{j}.snr_drop_db', '.1f')}"
                f" dB at K = {last['depth']}.")
    note = d.get("no_drop_note")
    return text + (f" {note}" if note else "")
