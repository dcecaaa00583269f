"""The held-out check of the carry along size, and the trend curve the report draws (DESIGN.md section 8).

`verify_block` compares a held-out proxy size, fitted on its own, with what the trend of the other
sizes predicts for it. As `fitting.transfer` says, the comparison widens the prediction interval by
the measured size's own spread in quadrature: on log K* for the reversal depth, on s itself for the
slope, each side of the interval separately (the interval need not be symmetric),

    lo' = p - sqrt((p - lo)^2 + (z se_m)^2),   hi' = p + sqrt((hi - p)^2 + (z se_m)^2),

with se_m the measured size's standard error from its own 95 % interval and z = 1.96, so "inside"
asks whether the prediction and the measurement agree given both uncertainties (not whether the
measured value falls in the prediction's band alone).

`trend_curve` evaluates the fitted trend of K* and s along one axis, with the interval of the
prediction at every point, for the report's figure.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from .transfer import _Z, AXES, _se, _x, fit_transfer, trend_of

__all__ = ["held_out_size", "verify_block", "trend_curve"]

Size = tuple[int, int]


def held_out_size(sizes: Sequence[Size], holdout: dict[str, Any] | None) -> Size | None:
    """The size among `sizes` that `holdout` ({"width", "train_rows"}) names, or None."""
    if not holdout or not any(holdout.get(a) for a in AXES):
        return None
    want = [int(holdout.get(a) or 0) for a in AXES]
    hits = [s for s in sizes if all(not w or s[i] == w for i, w in enumerate(want))]
    return max(hits) if hits else None


def _widened(point: float, ci: Sequence[float], se_measured: float | None) -> list[float]:
    extra = (_Z * se_measured) if se_measured else 0.0
    return [point - math.hypot(point - ci[0], extra), point + math.hypot(ci[1] - point, extra)]


def _inside_log(measured: float | None, measured_ci: Any, predicted: float | None, pred_ci: Any
                ) -> tuple[bool | None, list[float] | None]:
    if not measured or not predicted or not pred_ci or None in pred_ci or min(pred_ci) <= 0:
        return None, None
    lo, hi = _widened(math.log(predicted), [math.log(v) for v in pred_ci], _se(measured_ci, log=True))
    return bool(lo <= math.log(measured) <= hi), [math.exp(lo), math.exp(hi)]


def _inside_lin(measured: float | None, measured_ci: Any, predicted: float | None, pred_ci: Any
                ) -> tuple[bool | None, list[float] | None]:
    if measured is None or predicted is None or not pred_ci or None in pred_ci:
        return None, None
    lo, hi = _widened(predicted, pred_ci, _se(measured_ci, log=False))
    return bool(lo <= measured <= hi), [lo, hi]


_PREDICTED = ("reversal_depth", "reversal_depth_ci", "slope", "slope_ci",
              "depth_to_plan_for", "depth_to_plan_for_range", "plan_basis", "extrapolation_factor")


def verify_block(size_fits: dict[Size, dict[str, Any]], held: Size, held_fit: dict[str, Any] | str, *,
                 save_fraction: float, n_boot: int, seed: int, stored: dict[str, Any] | None = None) -> dict[str, Any]:
    """The `transfer.verify` block: the held-out size's prediction, its own measurement, and whether they agree.

    Args:
        size_fits: the per-size fits the trend is fitted on (the held-out size not among them).
        held: the held-out (width, rows).
        held_fit: its own fit (as `_fit_group` returns it), or why it could not be fitted.
        save_fraction, n_boot, seed: as for the transfer fit (the same seed gives the same prediction).
        stored: the prediction stored before the held-out size trained (`sweep.json`'s
            `verify.prediction`), used as the prediction when present.
    """
    out: dict[str, Any] = {"width": held[0] or None, "train_rows": held[1] or None, "predicted": None,
                           "predicted_at": None, "prediction_source": "recomputed", "measured": None,
                           "compared_interval": None, "inside": None, "slope_inside": None,
                           "depth_inside_range": None, "verdict": ""}
    if stored and stored.get("prediction"):
        out.update(predicted={k: stored["prediction"].get(k) for k in _PREDICTED},
                   predicted_at=stored.get("predicted_at"), prediction_source="stored before training")
    elif len(size_fits) >= 2:
        block = fit_transfer(size_fits, target={"width": held[0] or None, "train_rows": held[1] or None},
                             save_fraction=save_fraction, n_boot=n_boot, seed=seed)
        out["predicted"] = {k: (block["target"] or {}).get(k) for k in _PREDICTED}
        if stored:
            out["predicted_at"] = stored.get("predicted_at")
    if isinstance(held_fit, str):
        out["verdict"] = f"the held-out size could not be fitted ({held_fit})"
        return out
    rev, pl = held_fit["reversal"], held_fit["power_law"]
    observed = rev["status"] == "observed"
    out["measured"] = {"n_runs": held_fit["n_runs"], "reversal_status": rev["status"],
                       "reversal_depth": rev["depth"] if observed else None,
                       "reversal_depth_ci": rev.get("depth_ci") if observed else None,
                       "slope": pl["slope"], "slope_ci": pl["slope_ci"],
                       "depth_to_plan_for": held_fit["planning"]["recommended_depth"]}
    p, m = out["predicted"], out["measured"]
    if not p or p.get("reversal_depth") is None and p.get("slope") is None:
        out["verdict"] = "no prediction was made for the held-out size, so nothing is checked"
        return out
    out["inside"], k_int = _inside_log(m["reversal_depth"], m["reversal_depth_ci"], p["reversal_depth"],
                                       p["reversal_depth_ci"])
    out["slope_inside"], s_int = _inside_lin(m["slope"], m["slope_ci"], p["slope"], p["slope_ci"])
    out["compared_interval"] = {"reversal_depth": k_int, "slope": s_int}
    span, rec = p.get("depth_to_plan_for_range"), m["depth_to_plan_for"]
    if span and rec is not None:
        out["depth_inside_range"] = bool(span[0] <= rec <= span[1])
    if out["inside"] is None:
        out["verdict"] = ("K* is not compared: " + ("no K* was predicted" if p["reversal_depth"] is None else
                          f"the held-out size shows no reversal within its depths ({rev['status'].replace('_', ' ')})"))
    elif out["inside"]:
        out["verdict"] = "the measured K* lies inside the prediction interval: the carry held once"
    else:
        out["verdict"] = ("the measured K* lies OUTSIDE the prediction interval: the carry along size failed "
                          "its one check, so a target figure carried the same way is not to be trusted")
    return out


def trend_curve(block: dict[str, Any], points: Sequence[dict[str, Any]], *, n_boot: int, seed: int,
                n: int = 40) -> dict[str, Any] | None:
    """The trend of K* and s along the first axis of `block` (a fitted transfer block), with intervals.

    The curve runs from the smallest proxy to the largest of the proxies and `points` (the target,
    the held-out size) on a log grid; other axes sit at the largest proxy's value. The trends are
    refitted from the per-size rows with a bootstrap of their own (same estimates, fresh draws).
    """
    axes, rows = block.get("axes") or [], block.get("sizes") or []
    if not axes:
        return None
    axis = axes[0]
    rng = np.random.default_rng(seed)
    largest = {a: max(r[a] for r in rows) for a in axes}
    reach = [float(p[axis]) for p in points if p and p.get(axis)]
    x = np.exp(np.linspace(math.log(min(r[axis] for r in rows)), math.log(max([largest[axis]] + reach)), n))
    out: dict[str, Any] = {"axis": axis, "fixed": {a: largest[a] for a in axes if a != axis},
                           "largest_proxy": largest[axis], "x": x.tolist()}
    for name, key, log in (("slope", "slope", False), ("reversal_depth", "reversal_depth", True)):
        if log and block.get("status") != "supported":
            out[name] = None
            continue
        _, trend = trend_of(rows, key, axes, rng, n_boot, log=log)
        if trend is None:
            out[name] = None
            continue
        mid, lo, hi = [], [], []
        for v in x:
            point = {**largest, axis: v}
            m, ci, _ = trend.predict(_x(point, axes))
            f = math.exp if log else float
            mid.append(f(m))
            lo.append(f(ci[0]))
            hi.append(f(ci[1]))
        out[name] = {"median": mid, "lo": lo, "hi": hi}
    return out
