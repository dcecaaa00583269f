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
from .depthlaw import percentile_ci

_K_MAX = 1000          # deepest depth the planning figures search
MODELS = ("power_law", "saturating", "segmented", "two_term")   # code of a "selected" row = index
_N_COLS = {"power_law": 2, "saturating": 3, "segmented": 4, "two_term": 4}


# ---------------------------------------------------------------- planning figures

def log_t_curve(model: str, params: np.ndarray, depths: np.ndarray) -> np.ndarray:
    """Fitted mean log T at `depths` for each parameter row.

    Args:
        model: "power_law" with params (B, 2) = (a, s); "segmented" with
            params (B, 4) = (a, s, d, psi), d = rising - falling slope;
            "two_term" (B, 4) = (log A, s, log B, r); "saturating" (B, 3) =
            (log A, s, log T_inf); or "selected", coded rows (B, 5) = (code,
            p0..p3) of `depthplan.fitting.selection`, each row its own model.
        depths: (m,) depths K.

    Returns:
        (B, m) array.
    """
    params = np.atleast_2d(np.asarray(params, float))
    x = np.log(np.asarray(depths, float))[None]
    if model == "selected":
        return _log_t_selected(params, x)
    out = params[:, :1] + params[:, 1:2] * x
    if model == "segmented":
        out = out + params[:, 2:3] * np.clip(x - params[:, 3:4], 0.0, None)
    elif model == "two_term":
        out = np.logaddexp(out, params[:, 2:3] + params[:, 3:4] * x)
    elif model == "saturating":
        out = np.logaddexp(out, params[:, 2:3])
    elif model != "power_law":
        raise ValueError(f"unknown model {model!r}")
    return out


def _log_t_selected(rows: np.ndarray, x: np.ndarray) -> np.ndarray:
    """`log_t_curve` of coded rows (code, p0..p3), each row under its own model."""
    out = np.empty((len(rows), x.shape[1]))
    code = rows[:, 0].astype(int)
    for i, name in enumerate(MODELS):
        m = code == i
        if m.any():
            out[m] = log_t_curve(name, rows[m, 1:1 + _N_COLS[name]], np.exp(x[0]))
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
        ci = percentile_ci(boot)                       # whole depths: round the interval outwards
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


# ---------------------------------------------------------------- gaps and the depths to sweep next

GAP_RATIO = 1.3        # neighbouring swept depths further apart than this leave a gap
MAX_NEW_DEPTHS = 4     # at most this many depths suggested at once
PLAUSIBLE_WEIGHT = 0.1  # models with at least this Akaike weight count when answers are compared


def swept_gap(value: float, swept: Sequence[int], max_ratio: float = GAP_RATIO) -> tuple[int, int] | None:
    """The swept depths (a, b) around `value` when a < value < b and b / a > max_ratio, else None.

    A value at a swept depth lies in no gap.
    """
    if any(k == value for k in swept):
        return None
    below = [k for k in swept if k < value]
    above = [k for k in swept if k > value]
    if not below or not above:
        return None
    a, b = max(below), min(above)
    return (a, b) if b / a > max_ratio and b - a >= 2 else None


def depths_in_gaps(spans: Sequence[tuple[float, float]], swept: Sequence[int], *,
                   max_ratio: float = GAP_RATIO, max_new: int = MAX_NEW_DEPTHS) -> list[int]:
    """Depths to sweep next: inside the gaps of the swept depths that an answer reaches into.

    The one rule behind `planning.next_depths` and the adaptive sweep
    (`depthplan.sweep.schedule.decide`). A gap is a pair of neighbouring swept
    depths a < b with b / a > `max_ratio` and a whole depth between them; a
    span (lo, hi) reaches into it when lo < b and hi > a (a point answer is
    the span (v, v), so it must lie strictly between a and b). Each such gap is
    filled with the fewest whole depths, spaced evenly on a log scale, that
    leave no ratio above `max_ratio`; when more than `max_new` result, those
    nearest (in log K) to a span are kept.

    Example:
        >>> depths_in_gaps([(10.3, 10.3)], [2, 4, 8, 16, 32])
        [10, 13]
    """
    s = sorted(set(int(k) for k in swept))
    spans = [(float(lo), float(hi)) for lo, hi in spans
             if lo is not None and hi is not None and math.isfinite(lo) and math.isfinite(hi)]
    new: set[int] = set()
    for a, b in zip(s, s[1:]):
        if b / a <= max_ratio or b - a < 2 or not any(lo < b and hi > a for lo, hi in spans):
            continue
        m = max(1, math.ceil(math.log(b / a) / math.log(max_ratio) - 1e-9) - 1)
        new |= {min(b - 1, max(a + 1, round(a * (b / a) ** (i / (m + 1))))) for i in range(1, m + 1)}

    def distance(k: int) -> float:
        return min(0.0 if lo <= k <= hi else min(abs(math.log(k / max(lo, 1e-9))),
                                                 abs(math.log(k / max(hi, 1e-9))))
                   for lo, hi in spans)

    return sorted(sorted(new, key=distance)[:max_new])


def _answer_block(planning: dict[str, Any], reversal: dict[str, Any], depths: list[int],
                  model_answers: dict[str, dict[str, Any]], gain: bool,
                  capped: bool = False) -> dict[str, Any]:
    """Where the answer is not pinned down: gaps, model disagreement, the range, next depths.

    Returns the fields `recommended_range`, `gaps`, `models_disagree` and
    `next_depths` that `depthplan.fitting.assemble` adds to the planning block.
    `model_answers` maps each model to its Akaike `weight`, `k_star` and
    `recommended_depth`; `capped` says the recommendation was held at the
    depth of lowest measured T (a suspected rise), which also caps the range.
    """
    rec = planning["recommended_depth"]
    figures = [("reversal depth", reversal.get("depth"), reversal.get("depth_ci"))]
    for key, label in (("compute_optimal_depth", "compute-optimal depth"),
                       ("last_depth_worth_adding", "last depth worth adding")):
        fig = planning[key]
        figures.append((label, fig.get("depth"), fig.get("ci")))
    gaps = []
    for label, value, _ in figures:
        if value is None or not gain:
            continue
        gap = swept_gap(value, depths)
        if gap is not None:
            gaps.append({"figure": label, "value": value, "between": list(gap)})
    # models the data cannot rule out; answers outside the swept depths are flagged as
    # extrapolated elsewhere, so two of them differing is not called a disagreement
    plausible = {k: v for k, v in model_answers.items() if v["weight"] >= PLAUSIBLE_WEIGHT}
    disagree = []
    for key in ("recommended_depth", "k_star"):
        vals = {k: v[key] for k, v in plausible.items() if v.get(key) is not None}
        inside = any(depths[0] <= v <= depths[-1] for v in vals.values())  # else: extrapolated
        if len(vals) >= 2 and inside and max(vals.values()) - min(vals.values()) > 1:
            disagree.append({"figure": "depth to plan for" if key == "recommended_depth"
                             else "reversal depth", "by_model": vals})
    rec_range = None
    if gain and rec is not None:
        ci = next((c for _, v, c in figures[1:] if v == rec and c), None)
        ends = [rec] + (list(ci) if ci else [])
        ends += [v["recommended_depth"] for v in plausible.values()
                 if v.get("recommended_depth") is not None]
        gap = swept_gap(rec, depths)
        if gap is not None:
            ends += list(gap)
        lo, hi = int(min(ends)), int(max(ends))
        if capped:
            hi = min(hi, rec)
        rec_range = [lo, hi] if hi - lo >= 2 else None
    spans = [(g["value"], g["value"]) for g in gaps]
    spans += [(min(d["by_model"].values()), max(d["by_model"].values())) for d in disagree]
    if gaps or disagree:
        spans += [tuple(c) for _, v, c in figures if v is not None and c]
        if rec_range:
            spans.append(tuple(rec_range))
    return {"recommended_range": rec_range, "gaps": gaps, "models_disagree": disagree,
            "next_depths": depths_in_gaps(spans, depths) if gain else []}
