"""Drift-to-diffusion measures of the probe series (numpy only, no torch).

The trainer records, per layer, the weight displacement ||W_t - W_0||_F and
the gradient signal-to-noise ratio at log-spaced steps (`depthplan.probes`).
Here `growth_exponent`, `transition_step` and `snr_drop_db` reduce one such
series to a number, and `diffusion_summary` gives the `diffusion` block of
fit.json: their medians over seeds per (depth, layer).
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

def diffusion_summary(runs: Sequence[RunResult]) -> dict[str, Any] | None:
    """Per (depth, layer) medians over seeds of the probe measures; None without probes.

    For each layer: the SNR transition step and drop, and the displacement's
    growth exponent before (early) and after (late) the transition.
    """
    cells: dict[tuple[int, int], list[tuple[float, float, float, float]]] = {}
    for r in runs:
        if len(r.probe_steps) < 4 or not r.displacement:
            continue
        for layer, disp in enumerate(r.displacement):
            snr = r.snr_db[layer] if layer < len(r.snr_db) else ()
            t_tr = transition_step(r.probe_steps, snr) if len(snr) else math.nan
            drop = snr_drop_db(r.probe_steps, snr) if len(snr) else math.nan
            has_tr = math.isfinite(t_tr)
            late = growth_exponent(r.probe_steps, disp, start=t_tr if has_tr else None)
            early_steps = [s for s in r.probe_steps if not has_tr or s <= t_tr]
            early = growth_exponent(early_steps, disp[:len(early_steps)], late_fraction=1.0)
            cells.setdefault((r.depth, layer), []).append((late, early, t_tr, drop))
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

    return {"n_runs": len({(r.depth, r.seed) for r in runs if len(r.probe_steps) >= 4
                           and r.displacement}),
            "layers": layers, "late_exponent_median": overall("late_exponent"),
            "early_exponent_median": overall("early_exponent"),
            "transition_step_median": overall("transition_step"),
            "snr_drop_db_median": overall("snr_drop_db")}
