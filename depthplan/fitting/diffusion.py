"""Drift-to-diffusion measures of the probe series (numpy and scipy only, no torch).

The trainer records, per layer, the weight displacement ||W_t - W_0||_F and
the gradient signal-to-noise ratio at log-spaced steps up to each run's end
(`depthplan.train.probes`). Here `growth_exponent`, `late_window_fit`,
`transition_step` and `snr_drop_db` reduce one such series to a number, and
`diffusion_summary` gives the `diffusion` block of fit.json: their medians over
seeds per (depth, layer), per depth (`by_depth`) with their between-seed spread,
and the late exponent over the last half of the runs with an interval
(`late_window`), which `alpha_check` sets against alpha from the depth law.
"""
from __future__ import annotations

import math
import warnings
from typing import Any, Sequence

import numpy as np
from scipy import stats

from ..records import RunResult

# ---------------------------------------------------------------- one probe series

def growth_exponent(steps: Sequence[float], values: Sequence[float], *,
                    start: float | None = None, late_fraction: float = 0.5) -> float:
    """Log-log slope of `values` against `steps` over the late phase.

    Args:
        steps: probe steps (log-spaced), values: e.g. ||W_t - W_0||_F at each.
        start: first step of the late phase (e.g. `transition_step`); without
            it the last `late_fraction` of the log-step range is used.

    Returns:
        The ordinary least squares slope, NaN when fewer than three usable
        points remain. About 1 for steady drift, 1/2 for a random walk.
    """
    t = np.asarray(steps, float)
    v = np.asarray(values, float)
    ok = np.isfinite(t) & np.isfinite(v) & (t > 0) & (v > 0)
    t, v = np.log(t[ok]), np.log(v[ok])
    if len(t) < 3:
        return math.nan
    lo = math.log(start) if start is not None and start > 0 else (
        t.max() - late_fraction * (t.max() - t.min()))
    keep = t >= lo - 1e-12
    if keep.sum() < 3:
        return math.nan
    tk, vk = t[keep], v[keep]
    tc = tk - tk.mean()
    denom = float((tc ** 2).sum())
    return float((tc * (vk - vk.mean())).sum() / denom) if denom > 0 else math.nan


#: The late window of a run ending at step T is [LATE_START * T, T].
LATE_START = 0.5
#: Fewest probes in a late window for a slope with an interval (one residual degree of freedom).
LATE_MIN_POINTS = 3


def late_window_fit(steps: Sequence[float], values: Sequence[float], end: float, *,
                    start_fraction: float = LATE_START, level: float = 0.95) -> dict[str, float]:
    """Log-log slope of `values` over the probes in [start_fraction * end, end], with its t-interval.

    Ordinary least squares of log value on log step over the window's points; the interval is
    slope +/- t(level; n - 2) * se, se the slope's standard error from the residuals (the usual
    OLS interval, as `scipy.stats.linregress` gives its stderr). About 1 for steady drift and 1/2
    for a random walk (Feller vol. 1).

    Returns:
        {"slope", "se", "lo", "hi", "n_points"}: NaN (n_points as counted) when fewer than
        `LATE_MIN_POINTS` usable points fall in the window.
    """
    t = np.asarray(steps, float)
    v = np.asarray(values, float)[:len(t)]
    t = t[:len(v)]
    ok = np.isfinite(t) & np.isfinite(v) & (t > 0) & (v > 0)
    ok &= (t >= start_fraction * end * (1 - 1e-12)) & (t <= end * (1 + 1e-12))
    n = int(ok.sum())
    out = {"slope": math.nan, "se": math.nan, "lo": math.nan, "hi": math.nan, "n_points": n}
    if n < LATE_MIN_POINTS:
        return out
    x, y = np.log(t[ok]), np.log(v[ok])
    xc = x - x.mean()
    sxx = float((xc ** 2).sum())
    if not sxx > 0:
        return out
    slope = float((xc * (y - y.mean())).sum() / sxx)
    resid = y - y.mean() - slope * xc
    se = math.sqrt(float((resid ** 2).sum()) / (n - 2) / sxx)
    half = float(stats.t.ppf(0.5 + level / 2, n - 2)) * se
    out.update(slope=slope, se=se, lo=slope - half, hi=slope + half)
    return out


def _snr_levels(steps: Sequence[float], snr_db: Sequence[float],
                edge: float = 0.2) -> tuple[np.ndarray, np.ndarray, float, float]:
    """Probe steps, SNR values and the early and late levels (medians of the first and last fifth).

    A NaN SNR at a valid step is a probe below the floor of its window (`gradient_snr_db`; stored
    files hold it as null): it stays in the series as -inf, below every measured value, so a level
    whose median falls on such probes is -inf (known only to lie below the floor).
    """
    t = np.asarray(steps, float)
    q = np.asarray(snr_db, float)
    ok = np.isfinite(t) & (t > 0)
    t, q = t[ok], np.where(np.isnan(q[ok]), -np.inf, q[ok])
    if len(t) < 4:
        return t, q, math.nan, math.nan
    order = np.argsort(t)
    t, q = t[order], q[order]
    m = max(1, int(round(edge * len(t))))
    with np.errstate(invalid="ignore"):
        return t, q, float(np.median(q[:m])), float(np.median(q[-m:]))


def snr_drop_db(steps: Sequence[float], snr_db: Sequence[float]) -> float:
    """Fall of the gradient SNR (dB) from its early level to its late level.

    Levels are medians of the first and last fifth of the probes; NaN with
    fewer than four usable probes or when a level lies below the probe's floor
    (the drop is then not a number the probe can give).
    """
    _, _, early, late = _snr_levels(steps, snr_db)
    return early - late if math.isfinite(early) and math.isfinite(late) else math.nan


def transition_step(steps: Sequence[float], snr_db: Sequence[float], *,
                    min_drop_db: float = 3.0) -> float:
    """Step at which the SNR first falls below halfway between its early and late levels.

    Interpolated on log-step axes; where the first probe below halfway is
    below the floor, that probe's step. NaN when the SNR falls by less than
    `min_drop_db` (no drift-to-diffusion transition to speak of) or a level is
    below the floor (no halfway point).
    """
    t, q, early, late = _snr_levels(steps, snr_db)
    drop = snr_drop_db(steps, snr_db)
    if not (drop >= min_drop_db):
        return math.nan
    mid = 0.5 * (early + late)
    below = np.flatnonzero(q < mid)
    i = int(below[0])
    if i == 0:
        return float(t[0])
    if not math.isfinite(q[i]):
        return float(t[i])
    lt0, lt1 = math.log(t[i - 1]), math.log(t[i])
    frac = (q[i - 1] - mid) / (q[i - 1] - q[i])
    return float(math.exp(lt0 + frac * (lt1 - lt0)))


# ---------------------------------------------------------------- over runs

#: A depth whose median SNR drop is under this many dB counts as not dropping (`no_drop_note`):
#: well above the noise of a level (a median of a fifth of the probes) yet far below a real fall.
NO_DROP_DB = 2.0

#: The measures `by_depth` summarises, in the order they are written.
DEPTH_MEASURES = ("snr_first_db", "snr_last_db", "snr_drop_db", "transition_step",
                  "early_exponent", "late_exponent", "late_window_exponent")


def _end_snr(steps: Sequence[float], snr: Sequence[float]) -> tuple[float, float]:
    """SNR at the first and the last valid probe: NaN without probes, -inf below the floor."""
    t = np.asarray(steps, float)[:len(snr)]
    q = np.asarray(snr, float)[:len(t)]
    ok = np.isfinite(t) & (t > 0)
    if not ok.any():
        return math.nan, math.nan
    q = q[ok][np.argsort(t[ok], kind="stable")]
    q = np.where(np.isnan(q), -np.inf, q)
    return float(q[0]), float(q[-1])


def _layer_measures(r: RunResult, layer: int) -> dict[str, float]:
    """The probe measures of one layer of one run (NaN: undefined, -inf: below the SNR floor)."""
    disp = r.displacement[layer]
    snr = r.snr_db[layer] if layer < len(r.snr_db) else ()
    snr_steps = r.snr_probe_steps
    t_tr = transition_step(snr_steps, snr) if len(snr) else math.nan
    has_tr = math.isfinite(t_tr)
    early_steps = [s for s in r.probe_steps if not has_tr or s <= t_tr]
    first, last = _end_snr(snr_steps, snr) if len(snr) else (math.nan, math.nan)
    late = late_window_fit(r.probe_steps, disp, float(r.iterations))
    return {"snr_first_db": first, "snr_last_db": last,
            "snr_drop_db": snr_drop_db(snr_steps, snr) if len(snr) else math.nan,
            "transition_step": t_tr,
            "early_exponent": growth_exponent(early_steps, disp[:len(early_steps)],
                                              late_fraction=1.0),
            "late_exponent": growth_exponent(r.probe_steps, disp, start=t_tr if has_tr else None),
            "late_window_exponent": late["slope"], "late_window_se": late["se"],
            "late_window_n_points": float(late["n_points"])}


def _ranked(values: Sequence[float], q: float) -> float:
    """The q-quantile of `values`, NaN left out and -inf (below the floor) ranked lowest.

    NaN when nothing is defined; -inf when the quantile falls below the lowest measured value
    (it is known only to lie below the floor).
    """
    v = np.asarray(values, float)
    v = v[~np.isnan(v)]
    finite = v[np.isfinite(v)]
    if not len(finite):
        return -math.inf if len(v) else math.nan
    lowest = float(finite.min())
    sentinel = lowest - 1e6 * (1.0 + abs(lowest))      # stands below every measured value
    out = float(np.quantile(np.where(np.isneginf(v), sentinel, v), q))
    return out if out >= lowest else -math.inf


def _number(x: float) -> float | None:
    """A value for fit.json: None unless finite (fit.json holds no NaN or infinity)."""
    return x if math.isfinite(x) else None


def depth_rows(rows: Sequence[tuple[int, int, dict[str, float]]]) -> list[dict[str, Any]]:
    """The `by_depth` entries from (depth, run index, measures of one layer) rows.

    Per depth and measure: the median over every (layer, seed) value, and the between-seed
    spread of the per-run values (each run's median over its layers): their interquartile
    range with four runs or more (`spread` "iqr"), else their minimum and maximum ("min_max").
    """
    by: dict[int, dict[int, list[dict[str, float]]]] = {}
    for k, run, m in rows:
        by.setdefault(k, {}).setdefault(run, []).append(m)
    out = []
    for k, per in sorted(by.items()):
        iqr = len(per) >= 4
        lo_q, hi_q = (0.25, 0.75) if iqr else (0.0, 1.0)
        entry: dict[str, Any] = {"depth": k, "n_runs": len(per), "spread": "iqr" if iqr else "min_max"}
        for key in DEPTH_MEASURES:
            pooled = [m[key] for layers in per.values() for m in layers]
            per_run = [_ranked([m[key] for m in layers], 0.5) for layers in per.values()]
            entry.update({key: _number(_ranked(pooled, 0.5)),
                          f"{key}_lo": _number(_ranked(per_run, lo_q)),
                          f"{key}_hi": _number(_ranked(per_run, hi_q))})
        out.append(entry)
    return out


def no_drop_note(by_depth: Sequence[dict[str, Any]], threshold_db: float = NO_DROP_DB) -> str:
    """The sentence naming the depth from which on the SNR does not drop; '' when every depth drops.

    A depth does not drop when its median `snr_drop_db` is under `threshold_db`; depths without
    a drop value are passed over.
    """
    rows = [r for r in by_depth if r["snr_drop_db"] is not None]
    flat = [r["snr_drop_db"] < threshold_db for r in rows]
    if not rows or not flat[-1]:
        return ""
    i = len(flat)
    while i > 0 and flat[i - 1]:
        i -= 1
    why = f"(median drop under {threshold_db:g} dB)"
    if i == 0:
        return f"At no probed depth does the gradient SNR drop {why}."
    return f"From K = {rows[i]['depth']} on, the gradient SNR does not drop {why}."


#: Draws of the late-window bootstrap (`late_window_ci`) unless the fit asks for another number.
LATE_BOOT = 1000
#: How the late-window interval is made (fit.json `diffusion.late_window.ci_method`).
LATE_CI_METHOD = "seeds_within_depth+ols_t"


def late_window_ci(groups: Sequence[tuple[np.ndarray, np.ndarray, np.ndarray]], *, n_boot: int = LATE_BOOT,
                   seed: int = 0, level: float = 0.95) -> tuple[float, float, float]:
    """Median of late-window slopes with a two-level percentile bootstrap interval.

    Args:
        groups: per depth (slopes, standard errors, residual degrees of freedom), each
            (n_runs, n_layers); NaN where a series has no slope.

    Each draw resamples the runs of every depth with replacement (the bootstrap over seeds
    within depth of the depth law), moves each drawn slope by its own OLS error
    (se * a Student t variate with its degrees of freedom) and takes the median over every
    drawn (run, layer); the interval is the central `level` of those medians.

    Returns:
        (median of the slopes, lo, hi); NaN without any slope.
    """
    pooled = np.concatenate([g[0].ravel() for g in groups]) if groups else np.zeros(0)
    if not np.isfinite(pooled).any():
        return math.nan, math.nan, math.nan
    rng = np.random.default_rng([int(seed), 0x1A7E])
    parts = []
    for slopes, ses, dfs in groups:
        n_runs = len(slopes)
        pick = rng.integers(0, n_runs, (n_boot, n_runs))
        s, e, d = slopes[pick], ses[pick], dfs[pick]              # (n_boot, n_runs, n_layers)
        noise = rng.standard_t(np.where(np.isfinite(d) & (d > 0), d, 1.0))
        parts.append((s + np.where(np.isfinite(e), e, 0.0) * noise).reshape(n_boot, -1))
    draws = np.concatenate(parts, axis=1)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        medians = np.nanmedian(draws, axis=1)
    medians = medians[np.isfinite(medians)]
    if not len(medians):
        return float(np.nanmedian(pooled)), math.nan, math.nan
    tail = 50 * (1 - level)
    lo, hi = np.percentile(medians, [tail, 100 - tail])
    return float(np.nanmedian(pooled)), float(lo), float(hi)


def _late_groups(fits: Sequence[tuple[int, int, int, dict[str, float]]],
                 keep: Any = None) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """(slopes, ses, dfs) arrays per depth from (depth, run, layer, measures) rows passing `keep`."""
    by: dict[int, dict[int, dict[int, dict[str, float]]]] = {}
    for k, run, layer, m in fits:
        if keep is None or keep(k, layer):
            by.setdefault(k, {}).setdefault(run, {})[layer] = m
    out = []
    for k, per in sorted(by.items()):
        layers = sorted({j for ms in per.values() for j in ms})
        arr = np.full((3, len(per), len(layers)), np.nan)
        for i, ms in enumerate(per.values()):
            for c, j in enumerate(layers):
                if j in ms:
                    m = ms[j]
                    arr[:, i, c] = (m["late_window_exponent"], m["late_window_se"],
                                    m["late_window_n_points"] - 2)
        out.append((arr[0], arr[1], arr[2]))
    return out


def _interval(lo: float, hi: float) -> list[float] | None:
    return [lo, hi] if math.isfinite(lo) and math.isfinite(hi) else None


def late_window_block(fits: Sequence[tuple[int, int, int, dict[str, float]]], *, n_boot: int = LATE_BOOT,
                      seed: int = 0) -> dict[str, Any]:
    """fit.json's `diffusion.late_window` from (depth, run, layer, measures) rows (verdict unset)."""
    med, lo, hi = late_window_ci(_late_groups(fits), n_boot=n_boot, seed=seed)
    n_pts = [m["late_window_n_points"] for *_, m in fits]
    return {"start_fraction": LATE_START, "exponent": _number(med), "exponent_ci": _interval(lo, hi),
            "ci_method": LATE_CI_METHOD, "n_boot": n_boot,
            "n_series": len(fits),
            "n_fitted": sum(math.isfinite(m["late_window_exponent"]) for *_, m in fits),
            "n_points_median": _number(float(np.median(n_pts))) if n_pts else None,
            "alpha": None, "alpha_ci": None, "verdict": "not_enough_points"}


#: Verdicts of `alpha_check`.
VERDICTS = ("agree", "disagree", "not_enough_points", "no_alpha")


def alpha_check(late: dict[str, Any], alpha: float | None, alpha_ci: Sequence[float | None] | None) -> str:
    """Set the late-window exponent against alpha from the depth law; returns and stores the verdict.

    "agree" when the two 95 % intervals overlap (alpha alone where it has no interval), "disagree"
    when they do not, "not_enough_points" when no series has a late-window slope with an interval
    (fewer than `LATE_MIN_POINTS` probes in every run's last half), "no_alpha" when the depth law
    gives no alpha (no depth gain).
    """
    late["alpha"], late["alpha_ci"] = alpha, (list(alpha_ci) if alpha_ci else None)
    ci = late.get("exponent_ci")
    if late.get("exponent") is None or not ci:
        verdict = "not_enough_points"
    elif alpha is None:
        verdict = "no_alpha"
    else:
        a_lo, a_hi = alpha_ci if alpha_ci else (alpha, alpha)
        a_lo = alpha if a_lo is None else a_lo
        a_hi = math.inf if a_hi is None else a_hi
        verdict = "agree" if ci[0] <= a_hi and a_lo <= ci[1] else "disagree"
    late["verdict"] = verdict
    return verdict


def diffusion_summary(runs: Sequence[RunResult], *, n_boot: int = LATE_BOOT,
                      seed: int = 0) -> dict[str, Any] | None:
    """Per (depth, layer) medians over seeds of the probe measures; None without probes.

    For each layer: the SNR transition step and drop, the displacement's growth exponent before
    (early) and after (late) the transition, and over the last half of each run
    (`late_window_exponent`, with a bootstrap interval over seeds). `by_depth` gives the same
    measures (and the SNR at the first and last probe) per depth with their between-seed spread,
    `no_drop_note` the depth from which on the SNR no longer drops, and `late_window` the
    late-window exponent over every run and layer with its interval (compared with alpha by
    `alpha_check`).
    """
    rows: list[tuple[int, int, dict[str, float]]] = []
    fits: list[tuple[int, int, int, dict[str, float]]] = []
    cells: dict[tuple[int, int], list[tuple[float, float, float, float, float, float]]] = {}
    for i, r in enumerate(runs):
        if len(r.probe_steps) < 4 or not r.displacement:
            continue
        for layer in range(len(r.displacement)):
            m = _layer_measures(r, layer)
            rows.append((r.depth, i, m))
            if r.status != "diverged":
                fits.append((r.depth, i, layer, m))
            cells.setdefault((r.depth, layer), []).append(
                (m["late_exponent"], m["early_exponent"], m["transition_step"], m["snr_drop_db"],
                 m["late_window_exponent"], m["late_window_n_points"]))
    if not cells:
        return None
    layers = []
    for (k, layer), vals in sorted(cells.items()):
        arr = np.array(vals, float)
        med = [float(np.nanmedian(col)) if np.isfinite(col).any() else None for col in arr.T]
        _, lo, hi = late_window_ci(_late_groups(fits, lambda kk, jj: (kk, jj) == (k, layer)),
                                   n_boot=n_boot, seed=seed + 1)
        layers.append({"depth": k, "layer": layer, "n_runs": len(vals), "late_exponent": med[0],
                       "early_exponent": med[1], "transition_step": med[2],
                       "snr_drop_db": med[3], "late_window_exponent": med[4],
                       "late_window_exponent_ci": _interval(lo, hi),
                       "late_window_n_points": med[5]})

    def overall(key: str) -> float | None:
        v = [row[key] for row in layers if row[key] is not None]
        return float(np.median(v)) if v else None

    by_depth = depth_rows(rows)
    return {"n_runs": len({(r.depth, r.seed) for r in runs if len(r.probe_steps) >= 4
                           and r.displacement}),
            "layers": layers, "late_exponent_median": overall("late_exponent"),
            "early_exponent_median": overall("early_exponent"),
            "transition_step_median": overall("transition_step"),
            "snr_drop_db_median": overall("snr_drop_db"),
            "by_depth": by_depth, "no_drop_note": no_drop_note(by_depth),
            "late_window": late_window_block(fits, n_boot=n_boot, seed=seed)}
