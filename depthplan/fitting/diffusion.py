"""Drift-to-diffusion measures of the probe series (numpy only, no torch).

The trainer records, per layer, the weight displacement ||W_t - W_0||_F and
the gradient signal-to-noise ratio at log-spaced steps (`depthplan.probes`).
Here `growth_exponent`, `transition_step` and `snr_drop_db` reduce one such
series to a number, and `diffusion_summary` gives the `diffusion` block of
fit.json: their medians over seeds per (depth, layer), and per depth (`by_depth`)
with their between-seed spread.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

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
                  "early_exponent", "late_exponent")


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
    t_tr = transition_step(r.probe_steps, snr) if len(snr) else math.nan
    has_tr = math.isfinite(t_tr)
    early_steps = [s for s in r.probe_steps if not has_tr or s <= t_tr]
    first, last = _end_snr(r.probe_steps, snr) if len(snr) else (math.nan, math.nan)
    return {"snr_first_db": first, "snr_last_db": last,
            "snr_drop_db": snr_drop_db(r.probe_steps, snr) if len(snr) else math.nan,
            "transition_step": t_tr,
            "early_exponent": growth_exponent(early_steps, disp[:len(early_steps)],
                                              late_fraction=1.0),
            "late_exponent": growth_exponent(r.probe_steps, disp, start=t_tr if has_tr else None)}


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


def diffusion_summary(runs: Sequence[RunResult]) -> dict[str, Any] | None:
    """Per (depth, layer) medians over seeds of the probe measures; None without probes.

    For each layer: the SNR transition step and drop, and the displacement's
    growth exponent before (early) and after (late) the transition. `by_depth`
    gives the same measures (and the SNR at the first and last probe) per depth
    with their between-seed spread, and `no_drop_note` the depth from which on
    the SNR no longer drops.
    """
    rows: list[tuple[int, int, dict[str, float]]] = []
    cells: dict[tuple[int, int], list[tuple[float, float, float, float]]] = {}
    for i, r in enumerate(runs):
        if len(r.probe_steps) < 4 or not r.displacement:
            continue
        for layer in range(len(r.displacement)):
            m = _layer_measures(r, layer)
            rows.append((r.depth, i, m))
            cells.setdefault((r.depth, layer), []).append(
                (m["late_exponent"], m["early_exponent"], m["transition_step"], m["snr_drop_db"]))
    if not cells:
        return None
    layers = []
    for (k, layer), vals in sorted(cells.items()):
        arr = np.array(vals, float)
        med = [float(np.nanmedian(col)) if np.isfinite(col).any() else None for col in arr.T]
        layers.append({"depth": k, "layer": layer, "n_runs": len(vals), "late_exponent": med[0],
                       "early_exponent": med[1], "transition_step": med[2],
                       "snr_drop_db": med[3]})

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
            "by_depth": by_depth, "no_drop_note": no_drop_note(by_depth)}
