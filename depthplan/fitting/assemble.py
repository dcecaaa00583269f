"""Fit the depth scaling law to measured updates-to-convergence (numpy/scipy, no torch).

`fit_runs` turns run records into the content of `fit.json`; `fit_path` loads a
results folder or measurements table (see `depthplan.fitting.inputs`), fits and writes
the file; `power_law_curve` evaluates a fit's power law with its band. This
module assembles fit.json: it groups the runs by learning rate, fits each group
(`_fit_group`: which depths the law spans, which model the planning figures
use, the two-term cross-check of a reversal) and compares the groups. The
pieces it assembles live beside it; the package `depthplan.fitting`
re-exports every public name (`__all__`):

    estimators   fit_power_law (Tobit on log T; ordinary least squares when nothing
                 is censored), fit_segmented (broken stick, Muggeo 2003),
                 fit_two_term (T = A K**s + B K**r), bic; on plain arrays
    depthlaw     summarize_depths, bootstrap draws, the power-law and reversal blocks
    stuck        find_stuck: censored runs far beyond their converged siblings
    selection    the four models by AICc and Akaike weight, reselecting bootstrap, lack of fit
    planning     log_t_curve, last_depth_worth_adding, compute_optimal_depth,
                 fit_cost_model, and the planning and curve blocks
    cost         the cost of one update: FLOP count of the network as built, or seconds
    accuracy     validation accuracy per depth and the guard on the planned depth
    rates        the effective-rate effect of a fixed rate (T·lr·K across K) in words
    diffusion    the probe measures growth_exponent, transition_step, snr_drop_db,
                 and diffusion_summary
    summary      the warnings of fit.json and format_summary, the text the CLI prints

fit.json, schema "depthplan-fit/2" (full field list in docs/fit-json.md).
Numbers are JSON numbers, null where undefined; never NaN.

    schema            "depthplan-fit/2"
    source            what was fitted (path as given)
    input             {kind: results_folder|table, sweep_name, max_updates} (fit_path only)
    group             {lr_mode, learning_rate}: the runs the top-level fields describe
    depth_gain        true when the slope and its intervals lie below 0
    depths_swept, n_runs, eval_every
    per_depth[]       {depth, runs, converged, censored, diverged, median, q25, q75,
                       median_note, quartile_note, budget, seconds_per_update,
                       validation_accuracy, validation_accuracy_lo, _hi, _spread}
    power_law         {slope, slope_se, slope_ci, slope_ci_analytic, intercept, cov,
                       sigma, alpha, alpha_ci, r2, method, depths_used, n_runs,
                       n_censored, without_shallowest{...}}
    reversal          {status: observed|beyond_range|none, depth, depth_ci,
                       falling_slope, rising_slope, rising_slope_ci, bic_single,
                       bic_segmented, n_depths_past, smooth_depth, smooth_model,
                       rise_suspected, note}
    planning          {save_fraction, model, last_depth_worth_adding{depth, ci, extrapolated},
                       compute_optimal_depth{depth, ci, extrapolated, cost_model, note},
                       recommended_depth, recommended_basis, recommended_extrapolated,
                       cost_basis: flops|seconds|none, accuracy_check{...}, recommended_range,
                       gaps[], models_disagree[], next_depths[]}
    models            {criterion, chosen, depths_used, n_runs, candidates[]}
    stuck_runs[]      {depth, seed, budget}
    diffusion         null, or {n_runs, layers[], late_exponent_median,
                       transition_step_median, snr_drop_db_median, alpha, by_depth[],
                       no_drop_note, late_window{exponent, exponent_ci, alpha, alpha_ci,
                       verdict, ...}}
    curve             {model, depths, median, lo, hi}: fitted T and its 95 % band
    rate_effect       null, or {learning_rate, exponent, exponent_ci, direction, fold, ...}
    by_learning_rate  [] or one full fit (without this field) per rate group
    lr_interaction    null, or {primary, slopes[], lr_exponent, message}
    bootstrap         {n_boot, seed, method, n_failed}
    warnings[]        plain sentences
"""
from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from scipy import stats

from ..errors import DataError
from ..forked import fork_map
from ..records import STATUSES, ReversalStatus, RunResult, group_runs, primary_group, write_text_atomic
from .depthlaw import (
    RunArrays,
    percentile_ci,
    _gain,
    _location,
    power_law_block,
    _reversal_block,
    _with_alpha,
    summarize_depths,
)
from .cost import COST_BASES, network_of
from .diffusion import (
    alpha_check,
    diffusion_summary,
)
from .estimators import (
    _tobit_batch,
    fit_two_term,
)
from .inputs import eval_interval, load_runs, network_from_config, read_sweep_info
from .planning import (
    _answer_block,
    _curve_block,
    _planning_block,
)
from .rates import rate_effect, rate_effect_words, single_rate_warning
from .carry import held_out_size, trend_curve, verify_block
from .transfer import fit_transfer, size_of, target_error
from .selection import (
    N_PARAMS,
    akaike_weights,
    bootstrap_selection,
    eligible_models,
    fit_candidates,
    k_star,
    lack_of_fit,
)
from .stuck import find_stuck
from .summary import _accuracy_warnings, _describe, _group_warnings, _model_warnings, _plural

__all__ = ["SCHEMA", "fit_runs", "fit_path", "default_json_path", "power_law_curve"]


SCHEMA = "depthplan-fit/2"


# ---------------------------------------------------------------- one group of runs

def _fit_group(runs: list[RunResult], *, save_fraction: float, n_boot: int, seed: int,
               eval_every: int | None, source: str,
               cost: dict[str, Any] | None = None) -> dict[str, Any]:
    """The full fit of one learning-rate group (everything but the rate comparison); `cost`
    is {basis, network, seconds_are_proxy} for the compute-optimal depth (`network` None: the
    group's runs' own record, `cost.network_of`)."""
    stuck, per_depth, d, depths = _usable_runs(runs, source or "the runs")
    span, pl, gain, status, reversal, sel = _law_and_reversal(d, depths, n_boot, seed)
    k_lo, k_hi = (depths[0], depths[-1]) if status == "observed" else (span[0], span[-1])
    rise_after = span[-1] if reversal["rise_suspected"] else None
    cost = dict(cost or {})
    cost["network"] = network_of(runs) or cost.get("network")
    point, draws = sel["cands"][sel["chosen"]].row, sel["boot"]["rows"]
    planning = _planning_block("selected", point, draws, depths, per_depth, save_fraction, gain,
                               rise_after, cost)
    planning["model"] = sel["chosen"]
    models = _models_block(sel, depths, per_depth, save_fraction, gain, rise_after, cost)
    planning.update(_answer_block(planning, reversal, depths, {
        c["model"]: c for c in models["candidates"]}, gain,
        capped=rise_after is not None and planning["recommended_depth"] == rise_after))
    diffusion = diffusion_summary(runs, n_boot=n_boot, seed=seed + 5)
    if diffusion is not None:
        diffusion["alpha"] = pl["alpha"]
        alpha_check(diffusion["late_window"], pl["alpha"], pl["alpha_ci"])
    curve = _curve_block("selected", point, draws, k_lo, k_hi)
    curve["model"] = sel["chosen"]
    single = lack_of_fit(d.subset(d.K <= span[-1]), np.array([0.0, pl["intercept"], pl["slope"],
                                                            0.0, 0.0]), 3)
    pl["lack_of_fit"] = {k: single[k] for k in ("checked", "p_value", "missed_depths")}
    fit = {"depth_gain": gain, "depths_swept": depths, "n_runs": len(runs),
           "per_depth": per_depth, "power_law": pl, "reversal": reversal,
           "planning": planning, "models": models, "stuck_runs": [
               {"depth": r.depth, "seed": r.seed, "budget": r.iterations} for r in stuck],
           "diffusion": diffusion, "curve": curve,
           "eval_every": eval_every, "rate_effect": rate_effect(runs, pl, per_depth),
           "bootstrap": {"n_boot": n_boot, "seed": seed, "method": pl["ci_method"],
                         "n_failed": pl["n_boot_failed"]}}
    # the accuracy guard first (it can overturn the depth), then what the data leave unsettled
    fit["warnings"] = _accuracy_warnings(fit) + _model_warnings(fit) + _group_warnings(fit, d, eval_every)
    return fit


def _usable_runs(runs: list[RunResult], name: str) -> tuple[list[RunResult], list[dict[str, Any]], RunArrays, list[int]]:
    """Stuck runs, the per-depth table and the arrays the law is fitted on; DataError when too thin."""
    stuck = find_stuck(runs)
    per_depth = summarize_depths(runs, stuck)
    swept = [row["depth"] for row in per_depth]
    if len(swept) < 3:
        raise DataError(f"{name}: runs at {len(swept)} depth{'s' * (len(swept) != 1)} "
                        f"({', '.join(map(str, swept))}); a depth law needs at least three")
    stuck_ids = {id(r) for r in stuck}
    used = [r for r in runs if r.status in ("converged", "censored") and id(r) not in stuck_ids]
    d = RunArrays(np.array([r.depth for r in used], float),
                np.array([r.iterations for r in used], float),
                np.array([r.status == "censored" for r in used], bool))
    depths = sorted({int(k) for k in d.K})
    if len(depths) < 3:
        raise DataError(f"{name}: only {len(depths)} depths have runs that did not diverge; "
                        "a depth law needs at least three (lower the learning rate)")
    if len({r.depth for r in used if r.status == "converged"}) < 2:
        raise DataError(f"{name}: runs converged at fewer than two depths; raise the budget "
                        "(max_updates) so that the fit has values, not only lower bounds")
    return stuck, per_depth, d, depths


def _law_and_reversal(d: RunArrays, depths: list[int], n_boot: int, seed: int) -> tuple[Any, ...]:
    """The descending span, its power law, depth gain, the reversal verdict and the model selection."""
    rev, seg_draws = _reversal_block(d, depths, n_boot, seed)
    if rev["candidate"]:
        span = [k for k in depths if k <= rev["breakpoint"]]
    else:
        loc = _location(d, depths)
        span = [k for k in depths if k <= depths[int(np.argmin(loc))]]
        span = span if len(span) >= 3 else depths
    pl, _ = power_law_block(d.subset(d.K <= span[-1]), n_boot, seed + 2)
    pl = _with_alpha(pl)
    if len(span) >= 3:
        pl["without_shallowest"], _ = power_law_block(
            d.subset((d.K > span[0]) & (d.K <= span[-1])), n_boot, seed + 3)
        _with_alpha(pl["without_shallowest"])
    else:
        pl["without_shallowest"] = None
    gain = _gain(pl)
    status = (ReversalStatus.NONE if not gain else ReversalStatus.OBSERVED if rev["candidate"]
              else ReversalStatus.BEYOND_RANGE).value
    reversal = _reversal_fields(rev, status, d, depths, seg_draws)
    k_hi = depths[-1] if status == "observed" else span[-1]
    sel = _select_models(d.subset(d.K <= k_hi), status == "observed", n_boot, seed)
    if status == "observed":
        _reversal_from_models(reversal, sel)
    return span, pl, gain, status, reversal, sel


def _select_models(d: RunArrays, rising: bool, n_boot: int, seed: int) -> dict[str, Any]:
    """Fit the candidate models to `d`, weigh them, and refit them on bootstrap replicates."""
    names = eligible_models(len(np.unique(d.K)), rising)
    cands = fit_candidates(d, names)
    chosen = min(cands, key=lambda k: cands[k].aicc)
    boot = bootstrap_selection(d, cands, chosen, n_boot, seed)
    return {"d": d, "cands": cands, "chosen": chosen, "weights": akaike_weights(cands),
            "boot": boot}


def _reversal_from_models(reversal: dict[str, Any], sel: dict[str, Any]) -> None:
    """K* from the AICc-preferred model with a minimum; its interval reselects on every replicate."""
    rising = [k for k in ("segmented", "two_term") if k in sel["cands"]]
    best = sorted(rising, key=lambda k: sel["cands"][k].aicc)
    for name in best:
        k = float(k_star(sel["cands"][name].row)[0])
        if math.isfinite(k):
            reversal.update(depth=k, depth_ci=percentile_ci(sel["boot"]["k_star"]), model=name)
            reversal["note"] = f"T is lowest near K = {k:.1f} and rises past it"
            return


def _models_block(sel: dict[str, Any], depths: list[int], per_depth: list[dict[str, Any]],
                  save_fraction: float, gain: bool, rise_after: int | None,
                  cost: dict[str, Any] | None = None) -> dict[str, Any]:
    """fit.json `models`: every candidate with its AICc, Akaike weight, answers and lack of fit."""
    d, cands, w = sel["d"], sel["cands"], sel["weights"]
    best = min(c.aicc for c in cands.values())
    picks = sel["boot"]["picked"]
    out = []
    for name, c in cands.items():
        plan = _planning_block("selected", c.row, np.empty((0, 5)), depths, per_depth,
                               save_fraction, gain, rise_after, cost)
        lof = lack_of_fit(d, c.row, N_PARAMS[name])
        ks = float(k_star(c.row)[0])
        out.append({"model": name, "n_params": N_PARAMS[name], "loglik": c.loglik,
                    "aicc": c.aicc, "delta_aicc": c.aicc - best, "weight": w[name],
                    "bootstrap_share": float(np.mean(picks == name)) if len(picks) else None,
                    "params": _named_params(name, c.row),
                    "k_star": ks if math.isfinite(ks) else None,
                    "last_depth_worth_adding": plan["last_depth_worth_adding"]["depth"],
                    "compute_optimal_depth": plan["compute_optimal_depth"]["depth"],
                    "recommended_depth": plan["recommended_depth"],
                    "lack_of_fit": {k: lof[k] for k in ("checked", "p_value", "missed_depths")}})
    return {"criterion": "AICc", "chosen": sel["chosen"],
            "depths_used": sorted({int(k) for k in d.K}), "n_runs": len(d.K),
            "candidates": out}


def _named_params(name: str, row: np.ndarray) -> dict[str, float]:
    p = row[1:]
    if name == "power_law":
        return {"intercept": p[0], "slope": p[1]}
    if name == "segmented":
        return {"intercept": p[0], "falling_slope": p[1], "rising_slope": p[1] + p[2],
                "breakpoint": math.exp(p[3])}
    if name == "saturating":
        return {"A": math.exp(p[0]), "s": p[1], "T_inf": math.exp(p[2])}
    return {"A": math.exp(p[0]), "s": p[1], "B": math.exp(p[2]), "r": p[3]}


def _reversal_fields(rev: dict[str, Any], status: str, d: RunArrays, depths: list[int],
                     seg_draws: np.ndarray | None) -> dict[str, Any]:
    out = {key: rev.get(key) for key in ("falling_slope", "rising_slope", "rising_slope_ci",
                                         "bic_single", "bic_segmented", "n_depths_past")}
    out.update(status=status, depth=None, depth_ci=None, smooth_depth=None, smooth_model=None,
               rise_suspected=False, model=None, breakpoint=rev.get("breakpoint"))
    loc = _location(d, depths)
    k_min = depths[int(np.argmin(loc))]
    if status == "observed":
        out.update(depth=rev["breakpoint"], depth_ci=rev["breakpoint_ci"], model="segmented",
                   note=f"T is lowest near K = {rev['breakpoint']:.1f} and rises past it")
        tt = fit_two_term(d.K, d.T, d.C, start=(rev["falling_slope"], rev["rising_slope"]))
        if tt.converged and depths[0] / 4 <= tt.minimum_depth <= 4 * depths[-1]:
            out["smooth_depth"] = tt.minimum_depth
            out["smooth_model"] = {"A": tt.A, "B": tt.B, "s": tt.s, "r": tt.r}
    elif status == "beyond_range":
        if k_min == depths[-1]:
            out["note"] = (f"T still falls at the deepest swept depth (K = {depths[-1]}); "
                           "a reversal, if any, lies deeper")
        else:
            out["rise_suspected"] = True
            out["note"] = (f"T turns up past K = {k_min}, but the rise is not established "
                           f"({rev.get('reason') or 'too few depths'})")
    else:
        out["note"] = "depth gives no gain in the swept range, so there is nothing to reverse"
    return out


# ---------------------------------------------------------------- all runs

def _group_label(key: tuple[str, float | None], runs: list[RunResult]) -> dict[str, Any]:
    return {"lr_mode": key[0], "learning_rate": key[1], "n_runs": len(runs)}


def _lr_interaction(fits: list[dict[str, Any]], groups: dict[tuple[str, float | None],
                    list[RunResult]], primary: tuple[str, float | None]) -> dict[str, Any]:
    slopes = [{**f["group"], "slope": f["power_law"]["slope"],
               "slope_ci": f["power_law"]["slope_ci"], "depth_gain": f["depth_gain"]}
              for f in fits if "power_law" in f]
    fixed = [r for key, rs in groups.items() if key[0] == "fixed" and key[1] for r in rs
             if r.status in ("converged", "censored")]
    lr_exponent = None
    if len({r.learning_rate for r in fixed}) >= 2:
        X = np.column_stack([np.ones(len(fixed)), np.log([r.depth for r in fixed]),
                             np.log([r.learning_rate for r in fixed])])
        y = np.log([r.iterations for r in fixed])
        c = np.array([r.status == "censored" for r in fixed])
        lr_exponent = float(_tobit_batch(X, y[None], c[None])["beta"][0, 2])
    parts = [(f"{s['slope']:.2f} at the fixed rate {s['learning_rate']:g}"
              if s["lr_mode"] == "fixed" and s["learning_rate"] is not None else
              f"{s['slope']:.2f} with the rate tuned per depth" if s["lr_mode"] == "tuned" else
              f"{s['slope']:.2f} at a fixed rate") for s in slopes]
    message = "depth and learning rate interact: the slope is " + ", ".join(parts)
    if lr_exponent is not None:
        message += f"; across fixed rates T scales as lr^{lr_exponent:.2f}"
    effects = [f["rate_effect"] for f in fits if f.get("rate_effect")]
    if effects:
        message += "; " + "; ".join(rate_effect_words(e) for e in effects)
    message += (". A fixed-rate slope partly measures the rate; plan with the slope of the "
                "rate policy the big run will use"
                + (" (the headline figures are for the rate tuned per depth)"
                   if primary[0] == "tuned" else ""))
    return {"primary": {"lr_mode": primary[0], "learning_rate": primary[1]},
            "slopes": slopes, "lr_exponent": lr_exponent, "message": message}


def _check_fit_options(save_fraction: float, n_boot: int, cost: str = "flops") -> None:
    """Raise `ConfigError` when save_fraction, n_boot or the cost basis is out of range."""
    from ..errors import ConfigError
    if cost not in COST_BASES:
        raise ConfigError(f"cost: must be one of {'|'.join(COST_BASES)}; got {cost!r}")
    if not 0 < save_fraction < 1:
        raise ConfigError(f"save_fraction: must be between 0 and 1; got {save_fraction}")
    if n_boot < 20:
        raise ConfigError(f"n_boot: must be an int >= 20; got {n_boot}")


def _fit_by_rate(groups: dict[tuple[str, float | None], list[RunResult]], primary: tuple[str, float | None],
                 main: dict[str, Any], source: str, kw: dict[str, Any]) -> list[dict[str, Any]]:
    """A full fit per learning-rate group (the primary's is `main`); a group too thin to fit is skipped."""
    by_rate = []
    for key in groups:
        label = _group_label(key, groups[key])
        if key == primary:
            by_rate.append(main)
            continue
        try:
            by_rate.append({"group": label, **_fit_group(
                groups[key], source=f"{source or 'input'} ({_describe(label)})", **kw)})
        except DataError as exc:
            by_rate.append({"group": label, "skipped": str(exc)})
    return by_rate


def _by_size(runs: list[RunResult]) -> dict[tuple[int, int], list[RunResult]]:
    sizes: dict[tuple[int, int], list[RunResult]] = {}
    for r in runs:
        sizes.setdefault(size_of(r), []).append(r)
    return sizes


def _largest(sizes: dict[tuple[int, int], list[RunResult]]) -> tuple[int, int]:
    """The proxy closest to a bigger job: most width x rows, then most runs."""
    return max(sizes, key=lambda s: (max(s[0], 1) * max(s[1], 1), len(sizes[s])))


def _size_fits(sizes: dict[tuple[int, int], list[RunResult]], kw: dict[str, Any],
               source: str) -> tuple[dict[tuple[int, int], dict[str, Any]], dict[tuple[int, int], str]]:
    """Each size's fit of its primary rate curve, and the reason for every size that cannot be fitted."""
    fits, skipped = {}, {}
    items = list(sizes.items())
    for (size, _), (fit, why) in zip(items, fork_map(_fit_size, items, shared=(kw, source))):   # one per core
        if fit is not None:
            fits[size] = fit
        else:
            skipped[size] = why
    return fits, skipped


def _fit_size(shared: tuple[dict[str, Any], str], item: tuple[tuple[int, int], list[RunResult]]
              ) -> tuple[dict[str, Any] | None, str]:
    """One size's fit of its primary rate curve, or None and why it cannot be fitted (`fork_map` piece)."""
    kw, source = shared
    size, rs = item
    groups = group_runs(rs)
    try:
        return _fit_group(groups[primary_group(groups)], source=f"{source or 'input'} (size {size})", **kw), ""
    except DataError as exc:
        return None, str(exc)


def _transfer(size_fits: dict[tuple[int, int], dict[str, Any]], skipped: dict[tuple[int, int], str],
              target: dict[str, Any] | None, kw: dict[str, Any],
              holdout: dict[str, Any] | None = None) -> dict[str, Any]:
    """The trend along size of the per-size fits (fitting.transfer).

    A size that `holdout` names stays out of the trend; it is fitted on its own and compared with
    the trend's prediction for it (`transfer.verify`, fitting.carry).
    """
    held = held_out_size(list(size_fits) + list(skipped), holdout)
    fits, skipped = dict(size_fits), dict(skipped)
    held_fit = skipped.get(held) or fits.get(held)
    fits.pop(held, None)
    skipped.pop(held, None)
    block = fit_transfer(fits, target=target, save_fraction=kw["save_fraction"], n_boot=kw["n_boot"],
                         seed=kw["seed"] + 7, skipped=skipped)
    if held is not None and held_fit is not None:
        block["verify"] = verify_block(fits, held, held_fit, save_fraction=kw["save_fraction"], n_boot=kw["n_boot"],
                                       seed=kw["seed"] + 7, stored=(holdout or {}).get("stored"))
    if block["status"] != "single_size":
        ends = [target or {}, {"width": (held or (0, 0))[0], "train_rows": (held or (0, 0))[1]}]
        block["curve"] = trend_curve(block, ends, n_boot=kw["n_boot"], seed=kw["seed"] + 7)
    return block


def _check_target(target: dict[str, Any] | None, sizes: dict[tuple[int, int], list[RunResult]]) -> None:
    if not target or not any(target.get(a) for a in ("width", "train_rows")):
        return
    rows = [{"width": w or None, "train_rows": n or None} for w, n in sizes]
    why = target_error(target, rows)
    if why:
        from ..errors import ConfigError
        raise ConfigError(f"target (--target-width/--target-rows or the sweep file's target block): {why}")


def fit_runs(runs: list[RunResult], *, save_fraction: float = 0.05, n_boot: int = 400,
             seed: int = 0, eval_every: int | None = None, source: str = "",
             cost: str = "flops", network: dict[str, Any] | None = None,
             seconds_are_proxy: bool = True, target: dict[str, Any] | None = None,
             holdout: dict[str, Any] | None = None) -> dict[str, Any]:
    """Fit the depth law, the reversal and the planning figures to measured runs.

    Args:
        runs: run records (`load_runs`); statuses other than converged,
            censored and diverged, and trials of a learning-rate search
            (lr_mode "tuning"), are left out with a warning.
        save_fraction: a layer is worth adding while it saves at least this
            fraction of T.
        n_boot: bootstrap resamples for the intervals.
        seed: seed of the bootstrap.
        eval_every: evaluation interval, for the coarse-evaluation warning
            (default: read from the runs).
        source: name of the input, used in messages and stored in the result.
        cost: basis of the compute-optimal depth's cost per update: "flops" (the analytic
            count of the network as built, `depthplan.fitting.cost.update_flops`) or
            "seconds" (the measured seconds per update, fitted as a line in K).
        network: the network's shape when the runs do not record it ({n_inputs, n_classes,
            width or widths, batch_size}, see `depthplan.fitting.cost`).
        seconds_are_proxy: the runs' seconds are this machine's timings of proxies (a
            results folder), not used unless `cost="seconds"`; False for a user's timings of
            their own jobs (a table), which serve when the shape is unknown.
        target: the job to plan for, {"width": W, "train_rows": n} (either may be None); with
            runs at several proxy sizes the `transfer` block predicts its figures.
        holdout: {"width": W, "train_rows": n, "stored": the prediction stored before it trained
            (optional)}: a proxy size left out of the transfer fit and checked against its
            prediction (`transfer.verify`); the headline still describes the largest proxy.

    Returns:
        The content of fit.json (schema in the module docstring and
        docs/fit-json.md), JSON-ready, with no NaN. With several learning-rate
        groups the top level describes the primary group (the group with the
        rate tuned per depth when there is one, else the fixed-rate group with
        most runs; `records.primary_group`) and `by_learning_rate` holds a full
        fit per group.

    Raises:
        DataError: fewer than three depths, no converged runs at two depths, or
            no runs at all. ConfigError: save_fraction or n_boot out of range.
    """
    _check_fit_options(save_fraction, n_boot, cost)
    # trials of a learning-rate search measure the search, not the depth law
    known = [r for r in runs if r.status in STATUSES and r.lr_mode != "tuning"]
    if not known:
        raise DataError(f"{source or 'input'}: no finished runs to fit")
    if eval_every is None:
        eval_every = eval_interval(known)
    sizes = _by_size(known)
    _check_target(target, sizes)
    kw = dict(save_fraction=save_fraction, n_boot=n_boot, seed=seed, eval_every=eval_every,
              cost={"basis": cost, "network": network, "seconds_are_proxy": seconds_are_proxy})
    transfer, size_fits, biggest = None, {}, _largest(sizes)
    if len(sizes) > 1:          # the headline describes the largest proxy; the trend goes in `transfer`
        size_fits, skipped = _size_fits(sizes, kw, source)
        transfer = _transfer(size_fits, skipped, target, kw, holdout)
    groups = group_runs(sizes[biggest] if transfer is not None else known)
    primary = primary_group(groups)
    # the largest proxy's primary curve was fitted with the sizes (same runs, same options)
    main = {"group": _group_label(primary, groups[primary]),
            **(size_fits.get(biggest) or _fit_group(groups[primary], source=source, **kw))}
    by_rate, interaction = [], None
    if len(groups) > 1:
        by_rate = _fit_by_rate(groups, primary, main, source, kw)
        interaction = _lr_interaction(by_rate, groups, primary)
    notes = list(main["warnings"])
    if len(groups) == 1 and single_rate_warning(main["rate_effect"]):
        notes.append(single_rate_warning(main["rate_effect"]))
    if len(known) < len(runs):
        notes.insert(0, f"{_plural(len(runs) - len(known), 'run')} failed, unfinished or from "
                        "a learning-rate search left out")
    if interaction:
        notes.append(interaction["message"])
    if transfer is not None:
        notes.insert(0, f"runs at {len(sizes)} proxy sizes: the figures above are the largest proxy's "
                        f"(width {biggest[0] or 'not recorded'}, {biggest[1] or 'all'} training rows); "
                        "`transfer` carries the law along size")
        if transfer.get("warning"):
            notes.append(f"transfer: {transfer['warning']}")
        notes += [f"transfer to the target: {n}" for n in (transfer["target"] or {}).get("notes", [])]
        check = transfer.get("verify")
        if check and check["verdict"]:
            line = f"transfer, held-out check: {check['verdict']}"
            notes.insert(0, line) if check["inside"] is False else notes.append(line)
    result = {"schema": SCHEMA, "source": source, **main, "by_learning_rate": by_rate,
              "lr_interaction": interaction, "warnings": notes}
    if transfer is not None:
        transfer["headline_size"] = {"width": biggest[0] or None, "train_rows": biggest[1] or None}
        result["transfer"] = transfer
    return _clean(result)


def _clean(v: Any) -> Any:
    """JSON-ready copy: numpy scalars to Python, tuples to lists, NaN and inf to None."""
    if isinstance(v, dict):
        return {str(k): _clean(x) for k, x in v.items()}
    if isinstance(v, (list, tuple, np.ndarray)):
        return [_clean(x) for x in v]
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


def default_json_path(path: Path) -> Path:
    """Where `fit_path` writes: `<folder>/fit.json`, or `<stem>.fit.json` beside a table."""
    path = Path(path)
    return path / "fit.json" if path.is_dir() else path.with_name(path.stem + ".fit.json")


def fit_loaded(runs: list[RunResult], *, source: str, kind: str, info: dict[str, Any] | None = None,
               folder: Path | None = None, **kw: Any) -> dict[str, Any]:
    """fit.json's content for runs already read: `fit_runs` plus the `input` block.

    Args:
        runs: the runs (from `load_runs`, or a table given in memory).
        source: what the runs came from, as fit.json's `source` states it.
        kind: `results_folder` or `table`.
        info: the folder's sweep.json (eval_every, max_updates, name), if any.
        folder: the results folder, whose config.yaml gives the network's shape when the runs
            do not record it (for the FLOP count).
        **kw: passed to `fit_runs`.
    """
    info = info or {}
    if kw.get("target") is None and isinstance(info.get("target"), dict):      # the sweep file's target block
        kw["target"] = {a: info["target"].get(a) for a in ("width", "train_rows")}
    if kw.get("holdout") is None and isinstance(info.get("verify"), dict):     # the held-out size and its prediction
        kw["holdout"] = {**{a: info["verify"].get(a) for a in ("width", "train_rows")},
                         "stored": info["verify"].get("prediction")}
    kw.setdefault("eval_every", eval_interval(runs, info))
    kw.setdefault("source", source)
    kw.setdefault("seconds_are_proxy", kind == "results_folder")   # a table's seconds are the user's jobs
    if folder is not None and network_of(runs) is None:
        kw.setdefault("network", network_from_config(folder))
    fit = fit_runs(runs, **kw)
    fit["input"] = _clean({"kind": kind, "sweep_name": info.get("name"), "max_updates": info.get("max_updates")})
    return fit


def fit_path(path: Path, json_out: Path | None = None, **kw: Any) -> tuple[dict[str, Any], Path]:
    """Load a results folder or measurements table, fit it, and write fit.json.

    Args:
        path: results folder or CSV table (see `depthplan.tables.load_runs`).
        json_out: where to write; default `default_json_path(path)`.
        **kw: passed to `fit_runs` (save_fraction, n_boot, seed, eval_every, cost). A
            table's seconds count as the user's own timings (`seconds_are_proxy` False); a
            folder whose runs do not record their shape takes it from its config.yaml when
            that fixes it (`inputs.network_from_config`).

    Returns:
        (the fit, the path written). The file is replaced atomically.

    Raises:
        DataError: unreadable input, too few depths, or no folder for json_out.
    """
    path = Path(path)
    info = read_sweep_info(path) if path.is_dir() else {}
    fit = fit_loaded(load_runs(path), source=str(path), kind="results_folder" if path.is_dir() else "table",
                     info=info, folder=path if path.is_dir() else None, **kw)
    out = Path(json_out) if json_out is not None else default_json_path(path)
    if not out.parent.is_dir():
        raise DataError(f"{out}: the folder {out.parent} does not exist")
    write_text_atomic(out, json.dumps(fit, indent=2, allow_nan=False) + "\n")
    return fit, out


def power_law_curve(fit: dict[str, Any], depths: Sequence[float],
                    level: float = 0.95) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fitted median T of the power law at `depths`, with a band for the fitted line.

    Uses `power_law.intercept`, `slope` and `cov` (bootstrap covariance of
    intercept and slope) of a fit.json dict; the band is normal on log T at
    the given level. It is the uncertainty of the line, not of single runs.

    Returns:
        (median, lo, hi), each an array shaped like `depths`.
    """
    pl = fit["power_law"]
    x = np.log(np.asarray(depths, float))
    mean = pl["intercept"] + pl["slope"] * x
    cov = np.asarray(pl["cov"], float)
    sd = np.sqrt(np.maximum(cov[0, 0] + 2 * x * cov[0, 1] + x ** 2 * cov[1, 1], 0.0))
    z = stats.norm.ppf(0.5 + level / 2)
    return np.exp(mean), np.exp(mean - z * sd), np.exp(mean + z * sd)
