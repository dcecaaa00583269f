"""The planning figures of a fitted law, per parameter row (numpy/scipy, no torch).

`log_t_curve` evaluates the power law or the broken stick at given depths;
`last_depth_worth_adding` and `compute_optimal_depth` read the planning
figures off it, the latter with the cost of one update from `depthplan.fitting.cost` (by
default the FLOP count of the network as built; this machine's seconds per update, modelled
by `fit_cost_model`, when asked). Each takes a (B, p) array of parameters, so the point fit
and all bootstrap draws go through in one call. `_planning_block` and
`_curve_block` turn a group's point fit and bootstrap draws
(`depthplan.depthlaw`) into the `planning` and `curve` blocks of fit.json.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
from scipy import optimize

from .accuracy import accuracy_check
from .cost import choose_cost, cost_basis_of, cost_label, cost_per_update
from .depthlaw import _ci

_K_MAX = 1000          # deepest depth the planning figures search


# ---------------------------------------------------------------- planning figures

def log_t_curve(model: str, params: np.ndarray, depths: np.ndarray) -> np.ndarray:
    """Fitted mean log T at `depths` for each parameter row.

    Args:
        model: "power_law" with params (B, 2) = (a, s), or "segmented" with
            params (B, 4) = (a, s, d, psi), d = rising - falling slope.
        depths: (m,) depths K.

    Returns:
        (B, m) array.
    """
    params = np.atleast_2d(np.asarray(params, float))
    x = np.log(np.asarray(depths, float))[None]
    out = params[:, :1] + params[:, 1:2] * x
    if model == "segmented":
        out = out + params[:, 2:3] * np.clip(x - params[:, 3:4], 0.0, None)
    elif model != "power_law":
        raise ValueError(f"unknown model {model!r}")
    return out


def last_depth_worth_adding(model: str, params: np.ndarray, save_fraction: float = 0.05,
                            k_max: int = _K_MAX) -> np.ndarray:
    """Smallest K whose next layer saves less than `save_fraction` of T.

    Returns one depth per parameter row (float; NaN when every layer up to
    `k_max` still saves at least that much).
    """
    ks = np.arange(1, k_max + 2)
    lt = log_t_curve(model, params, ks)
    saving = 1.0 - np.exp(lt[:, 1:] - lt[:, :-1])        # (B, k_max)
    small = saving < save_fraction - 1e-9               # a saving of exactly the fraction is not "less"
    first = np.argmax(small, axis=1)
    return np.where(small.any(1), ks[first], np.nan).astype(float)


def fit_cost_model(depths: Sequence[float], seconds: Sequence[float]) -> tuple[float, float] | None:
    """Seconds per update as u + v K (u, v >= 0) from per-depth measurements, or None."""
    k = np.asarray(depths, float)
    sec = np.asarray(seconds, float)
    ok = np.isfinite(sec) & (sec > 0)
    if len(np.unique(k[ok])) < 2:
        return None
    coef, _ = optimize.nnls(np.column_stack([np.ones(ok.sum()), k[ok]]), sec[ok])
    if coef.sum() <= 0:
        return None
    return float(coef[0]), float(coef[1])


def compute_optimal_depth(model: str, params: np.ndarray, cost: tuple[float, float] | Sequence[float],
                          k_max: int = _K_MAX) -> np.ndarray:
    """Depth minimising T(K) times the cost of one update at K over 1..k_max, per parameter row.

    `cost` is a line (u, v), cost u + v K, or the cost of one update at K = 1, 2, ... (then the
    search stops at the last depth given, e.g. where a widths list ends). NaN where the minimum
    is at the deepest depth searched (deeper keeps paying within the law).
    """
    if isinstance(cost, tuple) and len(cost) == 2:
        ks = np.arange(1, k_max + 1)
        per_update = cost[0] + cost[1] * ks
    else:
        per_update = np.asarray(cost, float)[:k_max]
        ks = np.arange(1, len(per_update) + 1)
    total = log_t_curve(model, params, ks) + np.log(per_update)[None]
    j = np.argmin(total, axis=1)
    return np.where(j < len(ks) - 1, ks[j], np.nan).astype(float)


def _cost_array(cost_model: dict[str, Any]) -> tuple[float, float] | np.ndarray:
    """What `compute_optimal_depth` takes for a stored cost model: its line, or costs by depth."""
    if cost_model.get("intercept") is not None:
        return (float(cost_model["intercept"]), float(cost_model["per_layer"]))
    return cost_per_update(cost_model, np.arange(1, int(cost_model["max_depth"]) + 1))


def _optimal_figure(model: str, point: np.ndarray, draws: np.ndarray, per_depth: list[dict[str, Any]],
                    cost: dict[str, Any], figure: Any) -> dict[str, Any]:
    """The compute-optimal depth on the basis `cost` asks for: {basis, network, seconds_are_proxy}
    (`depthplan.fitting.cost.choose_cost`)."""
    sec = [(r["depth"], r["seconds_per_update"]) for r in per_depth
           if r["seconds_per_update"] is not None]
    line = fit_cost_model([k for k, _ in sec], [v for _, v in sec]) if sec else None
    cost_model, why = choose_cost(cost.get("basis", "flops"), cost.get("network"), line,
                                  seconds_are_proxy=cost.get("seconds_are_proxy", True))
    if cost_model is None:
        return {"depth": None, "ci": None, "extrapolated": False, "cost_model": None, "note": why}
    ok = np.isfinite(draws).all(1)
    per_update = _cost_array(cost_model)
    optimal = figure(compute_optimal_depth(model, point[None], per_update)[0],
                     compute_optimal_depth(model, draws[ok], per_update))
    optimal["cost_model"] = cost_model
    deepest = cost_model.get("max_depth") or _K_MAX
    optimal["note"] = why if optimal["depth"] is not None else (
        f"under the fitted law, T times the cost per update keeps falling up to {deepest} layers")
    return optimal


# ---------------------------------------------------------------- fit.json blocks

def _planning_block(model: str, point: np.ndarray, draws: np.ndarray, depths: list[int],
                    per_depth: list[dict[str, Any]], save_fraction: float, gain: bool,
                    rise_after: int | None = None, cost: dict[str, Any] | None = None) -> dict[str, Any]:
    """Planning figures; `rise_after` caps the recommendation where T turns up unconfirmed;
    `cost` chooses the cost basis of the compute-optimal depth (see `_optimal_figure`)."""
    lo, hi = depths[0], depths[-1]

    def figure(point_value: float, boot: np.ndarray) -> dict[str, Any]:
        value = None if not np.isfinite(point_value) else int(point_value)
        ci = _ci(boot)                       # whole depths: round the interval outwards
        ci = None if ci is None else [math.floor(ci[0]), math.ceil(ci[1])]
        return {"depth": value, "ci": ci,
                "extrapolated": value is None or not lo <= value <= hi}

    ok = np.isfinite(draws).all(1)
    worth = figure(last_depth_worth_adding(model, point[None], save_fraction)[0],
                   last_depth_worth_adding(model, draws[ok], save_fraction))
    optimal = _optimal_figure(model, point, draws, per_depth, cost or {}, figure)
    if not gain:
        worth = {"depth": lo, "ci": None, "extrapolated": False}
        optimal.update(depth=None, ci=None, extrapolated=False,
                       note="depth gives no gain in these runs")
        rec, basis = lo, "shallowest swept depth, as depth gives no gain here"
    else:
        options = [(worth["depth"], f"last depth worth adding (next layer saves under "
                                    f"{100 * save_fraction:g} %)"),
                   (optimal["depth"], f"compute-optimal depth ({cost_label(optimal['cost_model'])})")]
        options = [(k, b) for k, b in options if k is not None]
        rec, basis = min(options) if options else (None, "no figure could be computed")
        if rise_after is not None and (rec is None or rec > rise_after):
            rec, basis = rise_after, (f"depth of the lowest measured T: T turns up past it, "
                                      f"and the fitted law alone would say {rec or 'deeper'}")
    return {"save_fraction": save_fraction, "model": model,
            "last_depth_worth_adding": worth, "compute_optimal_depth": optimal,
            "recommended_depth": rec, "recommended_basis": basis,
            "recommended_extrapolated": rec is not None and not lo <= rec <= hi,
            "cost_basis": cost_basis_of(optimal["cost_model"]), "accuracy_check": accuracy_check(per_depth, rec)}


def _curve_block(model: str, point: np.ndarray, draws: np.ndarray, k_lo: float,
                 k_hi: float) -> dict[str, Any]:
    grid = np.geomspace(k_lo, k_hi, 60)
    ok = np.isfinite(draws).all(1)
    mid = np.exp(log_t_curve(model, point[None], grid)[0])
    if ok.sum() >= 10:
        lo, hi = np.exp(np.quantile(log_t_curve(model, draws[ok], grid), [0.025, 0.975], axis=0))
    else:
        lo = hi = np.full_like(grid, np.nan)
    return {"model": model, "depths": grid.tolist(), "median": mid.tolist(),
            "lo": lo.tolist(), "hi": hi.tolist()}


def total_cost_curve(fit: dict[str, Any]) -> tuple[np.ndarray, np.ndarray] | None:
    """(depths, cost): the fitted T along `curve` times the cost of one update, in the unit of
    the cost model (`planning.compute_optimal_depth.cost_model.unit`: flop or s)."""
    cost = fit["planning"]["compute_optimal_depth"].get("cost_model")
    if not cost:
        return None
    k = np.asarray(fit["curve"]["depths"], float)
    return k, np.asarray(fit["curve"]["median"], float) * cost_per_update(cost, k)
