"""The report's opening words: the depth to plan for and why, how sure, what was swept, the caution.

Numbers taken from fit.json are written through `Words` (see
`depthplan.report_markup`), so both renderings show the fit's own values and
the HTML tags each with its key; numbers computed here from the runs are
formatted directly.
"""
from __future__ import annotations

import math
import statistics
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from ..fit_record import Diffusion, FitGroup, PlannedDepth, given
from ..fitting.cost import cost_basis_of, cost_label, network_words
from ..fitting.planning import total_cost_curve
from ..fitting.rates import TUNE_KEY, rate_effect_of, rate_effect_words
from ..fitting.summary import MODEL_LABELS, caveat_sentences
from . import figures as F
from .inputs import ReportInputs
from .markup import EXTRAPOLATED, Block, Words

_FLAT = 0.10          # "nearly flat": fitted total compute within this fraction of its minimum
def badge(flag: Any) -> str:
    return EXTRAPOLATED if flag else ""


def save_percent(w: Words) -> str:
    return w.num("planning.save_fraction", "g@100")


# ---------------------------------------------------------------- the answer

def planned_cost_model(fig: PlannedDepth) -> dict[str, Any] | None:
    """A planned depth's cost model, None when it has none."""
    return fig.cost_model if given(fig.cost_model) else None


def _why(fit: FitGroup, w: Words) -> str:
    plan, rev = fit.planning, fit.reversal
    rec = plan.recommended_depth
    opt, worth = plan.compute_optimal_depth.depth, plan.last_depth_worth_adding.depth
    if not given(rec):
        return "No depth could be derived from these runs; see the warnings."
    if not fit.depth_gain:
        return (f"Depth gives no gain over the swept depths: the fitted slope s = "
                f"{w.num('power_law.slope')} is not clearly below zero, so added layers do not cut "
                "the number of updates, and the shallowest depth swept is the cheapest choice.")
    past = (f" Past the reversal depth (K* ≈ {w.num('reversal.depth', '.1f')}) each added layer "
            "costs more updates, not fewer." if rev.status == "observed" else "")
    if rec == opt and rec == worth:
        return "It is both the compute-optimal depth and the last depth worth adding." + past
    if rec == opt:
        return ("It is the compute-optimal depth: there the fitted number of updates times the "
                f"cost of one update ({cost_label(planned_cost_model(plan.compute_optimal_depth))}) "
                "is lowest"
                + (f", and it comes before the last depth worth adding (K = "
                   f"{w.num('planning.last_depth_worth_adding.depth', 'd')})." if worth else ".") + past)
    if rec == worth:
        return (f"It is the last depth worth adding: past it the next layer saves less than "
                f"{save_percent(w)} % of the updates"
                + (f", and it comes before the compute-optimal depth (K = "
                   f"{w.num('planning.compute_optimal_depth.depth', 'd')})." if opt else ".") + past)
    if rev.rise_suspected:
        return ("It is the swept depth with the fewest updates: T turns up past it, and although "
                "that rise is not established, the figures of the fitted law (which would go "
                "deeper) are capped there.")
    return f"It is the {plan.recommended_basis}."


def _fewest_updates(fit: FitGroup, w: Words) -> str:
    rev = fit.reversal
    head = "**Fewest updates (iteration-optimal):** "
    if rev.status == "observed":
        text = (f"K* ≈ {w.num('reversal.depth', '.1f')}{w.ci('reversal.depth_ci', '.1f')}. Below it "
                f"T falls as K^{{{w.num('reversal.falling_slope')}}}; past it T rises as "
                f"K^{{{w.num('reversal.rising_slope')}}}{w.ci('reversal.rising_slope_ci')}.")
        if rev.model == "two_term" and given(rev.breakpoint):
            text += (f" K* is the minimum of the smooth two-term model (preferred by AICc); the broken "
                     f"stick, as a cross-check, puts its corner at K ≈ {w.num('reversal.breakpoint', '.1f')}.")
        elif given(rev.smooth_depth):
            text += (f" A smooth two-term model, as a cross-check, puts the minimum at K ≈ "
                     f"{w.num('reversal.smooth_depth', '.1f')}.")
        return head + text
    if rev.status == "none":
        return head + "not defined: depth gives no gain here."
    if rev.rise_suspected:
        return head + (f"T is lowest at K = {w.num('power_law.depths_used.-1', 'd')} of the depths "
                       f"swept and turns up past it, but the rise is not established "
                       f"({rev.note}); add seeds and deeper depths before trusting it.")
    return head + (f"not inside the sweep: T still falls at the deepest depth swept (K = "
                   f"{w.num('depths_swept.-1', 'd')}), so the minimum, if there is one, lies "
                   "deeper. Sweep deeper to find it.")


def _compute_optimal(fit: FitGroup, w: Words) -> str:
    opt = fit.planning.compute_optimal_depth
    head = "**Least compute (compute-optimal):** "
    if planned_cost_model(opt) is None:
        return head + f"not given: {opt.note or 'no cost per update is known'}."
    p = "planning.compute_optimal_depth."
    cost = _cost_words(opt.cost_model, w, p + "cost_model.")
    if opt.depth is None:
        return head + f"not given: {opt.note or 'no minimum within the search range'} ({cost})."
    return head + (f"K = {w.num(p + 'depth', 'd')}{w.ci(p + 'ci', 'd')}{badge(opt.extrapolated)}, "
                   f"where the fitted updates times the cost of one update are lowest ({cost}).")


def _cost_words(cost: dict[str, Any], w: Words, p: str) -> str:
    """What one update costs on the fit's cost basis, and where that cost comes from."""
    if cost_basis_of(cost) == "flops":
        shape = network_words(cost)
        if cost.get("per_layer") is None:
            return (f"one update costs the floating-point operations of the network as built "
                    f"({shape}), counted layer by layer up to K = {w.num(p + 'max_depth', 'd')}: "
                    "an analytic count that holds on any hardware")
        # The fixed part is negative when the first layer (no gradient of its input, maybe fewer
        # inputs) costs less than a generic hidden layer by more than the readout costs: say
        # "less", never "plus -0.2".
        fixed = (f"plus a fixed {w.num(p + 'intercept', '.3g@1e-6')} MFLOP"
                 if (w.get(p + "intercept") or 0) >= 0 else
                 f"less a fixed {w.num(p + 'intercept', '.3g@-1e-6')} MFLOP (the first layer "
                 "costs less than the others)")
        return (f"one update costs {w.num(p + 'per_layer', '.3g@1e-6')} MFLOP per hidden layer "
                f"{fixed}, counted analytically for "
                f"the network as built ({shape}; forward and backward matrix products), so the "
                "figure holds on any hardware")
    where = ("seconds per update this machine measured on the proxy runs, chosen with "
             "`--cost seconds`; they include this machine's fixed overhead per update, which a "
             "big job on other hardware does not share"
             if cost.get("source", "").startswith("this machine") or not cost.get("source") else
             "seconds per update given in the measurements table")
    if "basis" not in cost:
        where = "this machine's measured seconds per update (a fit written before the FLOP basis)"
    return ("one update took about "
            + (f"{w.num(p + 'seconds_intercept', '.3g@1e3')} ms + "
               if cost["seconds_intercept"] > 0 else "")
            + f"{w.num(p + 'seconds_per_layer', '.3g@1e3')} ms per layer: {where}")


def _worth_adding(fit: FitGroup, w: Words) -> str:
    fig = fit.planning.last_depth_worth_adding
    head = "**Last depth worth adding:** "
    if fig.depth is None:
        return head + (f"not found: under the fitted law every added layer keeps saving at least "
                       f"{save_percent(w)} % of the updates over the whole search range.")
    p = "planning.last_depth_worth_adding."
    return head + (f"K = {w.num(p + 'depth', 'd')}{w.ci(p + 'ci', 'd')}{badge(fig.extrapolated)}: "
                   f"from there the next layer saves less than {save_percent(w)} % of the updates.")


def flat_cost_range(fit: FitGroup) -> tuple[int, int] | None:
    """Whole depths around the minimum where the fitted total compute is within `_FLAT` of it."""
    curve = total_cost_curve(fit.to_dict())
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


def _flat_words(fit: FitGroup) -> str:
    span = flat_cost_range(fit)
    if span is None or span[1] - span[0] < 2 or fit.planning.compute_optimal_depth.depth is None:
        return ""
    return (f"The total compute is nearly flat near its minimum: by the fitted law it stays within "
            f"{100 * _FLAT:.0f} % of the lowest value from K = {span[0]} to K = {span[1]}, so any "
            "depth in that range costs about the same compute; choose among them by what else "
            "matters (memory, latency, the rest of the architecture).")


def _how_sure(fit: FitGroup, w: Words) -> str:
    pl = fit.power_law
    text = (f"**How sure.** Over depths {w.num('power_law.depths_used.0', 'd')} to "
            f"{w.num('power_law.depths_used.-1', 'd')} the law T ∝ K^{{s}} fits with s = "
            f"{w.num('power_law.slope')}{w.ci('power_law.slope_ci')}, standard error "
            f"{w.num('power_law.slope_se')}")
    if given(pl.alpha):
        text += f", so α = 1/(1 − s) = {w.num('power_law.alpha')}{w.ci('power_law.alpha_ci')}"
    text += f"; R² = {w.num('power_law.r2')}."
    if given(pl.alpha):
        text += " (Free diffusion, α = 1/2, gives s = −1: doubling the depth halves the updates.)"
    how = ("of the seeds within each depth" if fit.bootstrap.method == "seeds_within_depth"
           else "of the fit's residuals, since some depth has a single run")
    text += (f" Intervals are 95 % percentile intervals from {w.num('bootstrap.n_boot', 'd')} "
             f"bootstrap resamples {how}")
    models = fit.models
    if models:
        ranked = sorted(models.candidates, key=lambda c: -c.weight)
        text += ("; every resample refits the candidate models and picks one again by AICc, so the "
                 "depth intervals carry the doubt about which model is right as well as the seed noise. "
                 "Akaike weights: " + ", ".join(f"{MODEL_LABELS.get(c.model, c.model)} {c.weight:.2f}"
                                                 for c in ranked))
    text += "."
    if pl.without_shallowest:
        text += (f" Leaving out the shallowest depth gives s = "
                 f"{w.num('power_law.without_shallowest.slope')}"
                 f"{w.ci('power_law.without_shallowest.slope_ci')}.")
    if pl.n_censored:
        one = pl.n_censored == 1
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


def model_words(model: Any) -> str:
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
    fit = inp.result
    depths = ", ".join(str(k) for k in fit.depths_swept)
    seeds = sorted({row.runs for row in fit.per_depth})
    per = f"{seeds[0]}" if len(seeds) == 1 else f"{seeds[0]} to {seeds[-1]}"
    trained = [r for r in inp.runs if r.lr_mode != "tuning"]
    head = (fit.transfer.headline_size or {}) if fit.transfer else {}
    sized = [r for r in trained if (not head.get("width") or r.width == head["width"])
             and (r.train_rows or 0) == (head.get("train_rows") or 0)] if head else trained
    runs_words = f"{fit.n_runs} runs" + (
        f" with the {F.group_label(fit.group)} ({len(sized)} at this size)" if len(sized) > fit.n_runs else "")
    if head:
        every = [r for r in inp.every_size if r.lr_mode != "tuning"]
        widths = sorted({r.width for r in every if r.width})
        rows = sorted({r.train_rows for r in every if r.train_rows})
        runs_words += (f" of the largest proxy ({', '.join(f'{k} {v:,}'.replace('_', ' ') for k, v in head.items() if v)}),"
                       f" out of {len(every)} runs at every proxy size ("
                       + "; ".join(p for p in (f"widths {', '.join(map(str, widths))}" if len(widths) > 1 else "",
                                               f"training rows {', '.join(f'{n:,}' for n in rows)}" if len(rows) > 1 else "")
                                   if p) + ")")
    if inp.kind == "table":
        return (f"**What was measured.** {fit.n_runs} rows of the measurements table "
                f"`{inp.path.name}` at depths {depths}, {per} runs per depth. The table does not say how "
                "the jobs were set up, so this report cannot either.")
    cfg = inp.config
    if cfg is None:
        why = "could not be read" if inp.config_text else "is missing"
        return (f"**What was swept.** {runs_words} at depths {depths}, {per} seeds per depth (the "
                f"folder's config.yaml {why}, so the settings are not described).")
    opt = "SGD" if cfg.train.optimizer == "sgd" else cfg.train.optimizer.capitalize()
    return (f"**What was swept.** {runs_words} on {_dataset_words(cfg)}: depths {depths} "
            f"({len(fit.depths_swept)} depths), {per} seeds per depth. Each network is "
            f"{model_words(replace(cfg.model, width=head['width']) if head.get('width') else cfg.model)} trained with "
            f"{opt}, {_rate_words(cfg)}, batch {cfg.train.batch_size}, at most "
            f"{cfg.train.max_updates:,} updates; a run counts as converged at the first check (every "
            f"{cfg.train.eval_every} updates) at which {_criterion_words(cfg)}.")


def _n_params(inp: ReportInputs) -> str:
    rec = inp.result.planning.recommended_depth
    sized = [r for r in inp.primary_runs if r.n_params]
    if not sized or not given(rec):
        return ""
    k = min({r.depth for r in sized}, key=lambda d: abs(math.log(d / rec)))
    n = statistics.median(r.n_params for r in sized if r.depth == k)
    return f" (about {n:,.0f} parameters at K = {k})"


def _caution(inp: ReportInputs, w: Words) -> str:
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
    far = F.extrapolated_depths(inp.result)
    if far:
        text += (f" Figures marked {EXTRAPOLATED} lie outside the swept depths {lo} to {hi} and rest "
                 f"on the fitted law alone (here K = {', '.join(map(str, far))}).")
    tg = inp.result.transfer.target if inp.result.transfer else None
    if tg and tg.past_swept_depths:
        text += (f" The target's carried depths reach past the deepest depth the proxies swept "
                 f"({tg.deepest_swept_depth}) and rest on the carried law alone.")
    elif not far:
        text += f" No figure in this report lies outside the swept depths {lo} to {hi}."
    groups = F.fitted_groups(inp.result)
    if len(groups) == 1 and groups[0].group.lr_mode == "fixed" and given(groups[0].group.learning_rate):
        text += _single_rate_words(groups[0])
    return text


def _single_rate_words(group: FitGroup) -> str:
    """The caution of a sweep with one fixed rate, with the measured direction of T·lr·K."""
    effect = group.rate_effect or rate_effect_of(group.to_dict())
    trend = f" Here, {rate_effect_words(effect)}." if effect else ""
    return (" One learning rate served every depth, and at one rate a deeper net takes effectively "
            "larger steps, so the slope includes the rate effect and part of the gain credited to "
            f"depth may be the rate's.{trend} A sweep with the rate tuned per depth ({TUNE_KEY}) "
            "separates the two.")


def answer_blocks(inp: ReportInputs, w: Words) -> list[Block]:
    """The answer first: the depth to plan for, why, the three figures, how sure, what was swept."""
    fit = inp.result
    plan = fit.planning
    lead = (f"**Plan for {w.num('planning.recommended_depth', 'd')} hidden layers**"
            f"{badge(plan.recommended_extrapolated)}. {_why(fit, w)}")
    if not given(plan.recommended_depth):
        lead = _why(fit, w)
    blocks: list[Block] = [("h", 2, "The answer", "answer"), ("p", lead, "answer lead")]
    blocks += _accuracy_blocks(fit, w)     # first: a worse-generalising depth can overturn the answer
    caveats = caveat_sentences(inp.fit)
    if caveats:   # said before the figures: where the data do not settle the answer, stuck runs
        blocks.append(("p", " ".join(t[0].upper() + t[1:] + "." for t in caveats), "caveats"))
    blocks.append(("ul", [_fewest_updates(fit, w), _compute_optimal(fit, w), _worth_adding(fit, w)]))
    flat = _flat_words(fit)
    if flat:
        blocks.append(("p", flat))
    if fit.lr_interaction:
        blocks.append(("p", f"These figures are for the {F.group_label(fit.group)}; the sweep "
                            "holds other learning-rate groups, compared further down."))
    blocks += [("p", _how_sure(fit, w)), ("p", _what_was_swept(inp)), ("p", _caution(inp, w), "caution")]
    return blocks


def _accuracy_blocks(fit: FitGroup, w: Words) -> list[Block]:
    """Right under the lead: the planned depth's validation accuracy when it is clearly below the best."""
    check = fit.planning.accuracy_check or {}        # a plain block
    if not check.get("clearly_below"):
        return []
    p = "planning.accuracy_check."
    near = ("" if check["depth"] == fit.planning.recommended_depth else
            f" (the swept depth nearest the planned {w.num('planning.recommended_depth', 'd')})")
    return [("p", f"**Accuracy warning.** At K = {w.num(p + 'depth', 'd')}{near} the validation accuracy "
                  f"is {w.num(p + 'accuracy', '.1f@100')} % (median over seeds), clearly below the "
                  f"{w.num(p + 'best_accuracy', '.1f@100')} % of K = {w.num(p + 'best_depth', 'd')}: "
                  "their spreads over seeds do not overlap. Fewer updates to converge do not make "
                  "it the better network; weigh accuracy before committing to this depth (see the "
                  "per-depth table).", "answer warning")]


def dynamics_words(fit: FitGroup, w: Words) -> str:
    """The probe cross-check in a few sentences (or '' without probes)."""
    d = fit.diffusion
    if not d or not d.to_dict() or (not given(d.late_exponent_median) and not d.late_window):
        return ""
    text = _late_window_words(d, w) if d.late_window else _old_late_words(d, w)
    parts = (("snr_drop_db_median", ".1f", " The gradient SNR falls by a median {} dB"),
             ("transition_step_median", ".0f", ", around step {}"))
    snr = "".join(t.format(w.num(f"diffusion.{key}", fmt)) for key, fmt, t in parts
                  if given(getattr(d, key)))
    return text + (snr + "." if snr else "") + _depth_drop_words(d, w)


def _old_late_words(d: Diffusion, w: Words) -> str:
    """The sentence of files written before the late window existed: two numbers side by side."""
    text = ("Over all probed depths and layers, the late-phase growth exponent of the displacement "
            f"has median {w.num('diffusion.late_exponent_median', '.2f')}")
    if given(d.alpha):
        text += f" (α from the depth law: {w.num('diffusion.alpha', '.2f')})"
    return text + "."


#: The verdict of the late-window check in words (fit.json `diffusion.late_window.verdict`).
_VERDICT_SENTENCES = {
    "agree": "The two agree: their 95 % intervals overlap.",
    "disagree": "The two disagree: their 95 % intervals do not overlap, so the depth law and the "
                "weights' own late motion tell different stories here.",
    "not_enough_points": "They cannot be compared: no run has 3 probes or more in its last half.",
    "no_alpha": "There is no α to compare: the depth law gives no gain from depth.",
}


def _late_window_words(d: Diffusion, w: Words) -> str:
    """The late-window exponent with its interval, α with its interval, and the verdict."""
    late = d.late_window
    if not given(late.exponent):
        exponent = ("The growth exponent of the weight displacement over the last half of each "
                    "run (steps T/2 to T) is not measured: too few probes fall there.")
    else:
        exponent = ("Over the last half of each run (steps T/2 to T), the weight displacement grows "
                    f"with exponent {w.num('diffusion.late_window.exponent', '.2f')}"
                    f"{w.ci('diffusion.late_window.exponent_ci')}: the median over runs and layers "
                    "of least-squares slopes on log-log axes, its interval from a bootstrap over "
                    "seeds that also draws each slope within its own t-interval.")
    alpha = ""
    if given(late.alpha):
        alpha = (f" α from the depth law is {w.num('diffusion.late_window.alpha', '.2f')}"
                 f"{w.ci('diffusion.late_window.alpha_ci')}.")
    return f"{exponent}{alpha} {_VERDICT_SENTENCES.get(late.verdict, '')}"


def _depth_drop_words(d: Diffusion, w: Words) -> str:
    """' Per depth, the drop is a dB at K = 1 and b dB at K = 24. <no-drop note>' (or '')."""
    rows = [(i, r) for i, r in enumerate(d.by_depth or []) if given(r.snr_drop_db)]
    text = ""
    if len(rows) >= 2:
        (i, first), (j, last) = rows[0], rows[-1]
        text = (f" Per depth, the median SNR drop is {w.num(f'diffusion.by_depth.{i}.snr_drop_db', '.1f')}"
                f" dB at K = {first.depth} and {w.num(f'diffusion.by_depth.{j}.snr_drop_db', '.1f')}"
                f" dB at K = {last.depth}.")
    note = d.no_drop_note
    return text + (f" {note}" if note else "")
