"""The sentences of a fit: fit.json's warnings and the summary `depthplan fit` prints.

`_group_warnings` writes the warnings of one learning-rate group from its
assembled fit; `format_summary` turns a whole fit.json dict into the short
plain text of the CLI. Plain Python, no torch.
"""
from __future__ import annotations

from typing import Any, Sequence

from ..fit_record import FitResult, Planning, Reversal
from .depthlaw import _Arrays

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

def _group_warnings(fit: dict[str, Any], d: _Arrays, eval_every: int | None) -> list[str]:
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
        elif abs(rev["smooth_depth"] - rev["depth"]) > 1:
            out.append(f"the segmented fit (K = {rev['depth']:.1f}) and the smooth two-term model "
                       f"(K = {rev['smooth_depth']:.1f}) disagree by more than one layer")
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


# ---------------------------------------------------------------- summary text

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
    if plan.recommended_depth is not None:
        lines.append(f"Recommended depth: {_plural(plan.recommended_depth, 'layer')}"
                     + (" [extrapolated]" if plan.recommended_extrapolated else "")
                     + f" (from the {plan.recommended_basis}).")
    lines += _law_lines(r) + [_reversal_line(r.reversal)] + _planning_lines(plan)
    probes = _probe_line(r)
    if probes:
        lines.append(probes)
    if r.lr_interaction:
        lines.append(f"Several learning-rate groups: the figures above are for the "
                     f"{_describe(r.group.to_dict())}; each group is fitted in by_learning_rate.")
    if r.warnings:
        lines.append("Warnings:")
        lines.extend(f"  - {w}" for w in r.warnings)
    lines.append("These figures come from small proxy networks; the depth law of the big run "
                 "may differ, so check a depth or two at full scale before committing.")
    return "\n".join(lines)


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
        lines.append(f"Compute-optimal depth (measured seconds per update): {opt.depth}"
                     f"{_ci_text(opt.ci, '.0f')}" + (" [extrapolated]" if opt.extrapolated else "") + ".")
    elif opt.note:
        lines.append(f"Compute-optimal depth: not given ({opt.note}).")
    return lines


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
