"""From proxies to the target job: how the depth law moves with proxy size, and its carry to a target.

shared/DESIGN.md section 8. A proxy size g is (hidden width W_g, training rows n_g). Each size has
its own fit (the existing estimators, `assemble._fit_group`), giving the slope s_g and, where a
reversal is observed, K*_g, each with a bootstrap interval that resamples runs within every depth of
that size (Efron and Tibshirani 1993). The trend along size is fitted by weighted least squares:

    log K*_g = a + b_W log W_g + b_n log n_g         weights 1 / var(log K*_g)
    s_g      = s_0 + c_W log W_g + c_n log n_g       weights 1 / var(s_g)

with only the axes that vary (an axis with one distinct value has no trend). Variances come from
each size's 95 % interval (its width / (2 x 1.96), on log K* for K*). When the points scatter about
the trend more than their variances explain (reduced chi-square phi > 1), every variance is scaled
by phi (the Birge ratio of weighted least squares with known errors).

Intervals of the exponents and of the prediction at a target come from a parametric bootstrap of the
whole chain: each replicate draws every size's estimate from a normal with its (scaled) variance and
refits the trend; the 2.5 and 97.5 percentiles of the replicates' predictions are the interval. This
propagates the per-size run-resampling intervals through the trend without refitting every size on
every replicate. A measured held-out size is compared with the prediction widened by its own
measurement spread (in quadrature).

The carry is "not_supported" (no target depth) when fewer sizes have an observed K* than the trend
has terms plus one, when the K*_g are not monotone along an axis beyond their spread, or when no
exponent differs from zero by two standard errors and the residual spread exceeds the trend's range.
Extrapolation factor per axis: target / largest proxy; past 8 the figure is a guess and says so.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from .planning import last_depth_worth_adding

__all__ = ["AXES", "size_of", "fit_transfer", "target_error", "trend_of", "FAR_FACTOR", "SHORT_FACTOR"]

AXES = ("width", "train_rows")
SHORT_FACTOR = 4.0       # up to here the carry is short
FAR_FACTOR = 8.0         # past this on any axis the prediction is a guess
_Z = 1.959963984540054   # 97.5 % point of the standard normal


def size_of(run: Any) -> tuple[int, int]:
    """A run's proxy size (width, training rows); 0 where the run does not record it."""
    return int(getattr(run, "width", 0) or 0), int(getattr(run, "train_rows", 0) or 0)


def _se(ci: Sequence[float | None] | None, log: bool) -> float | None:
    if not ci or ci[0] is None or ci[1] is None:
        return None
    lo, hi = float(ci[0]), float(ci[1])
    if log:
        if lo <= 0 or hi <= 0:
            return None
        lo, hi = math.log(lo), math.log(hi)
    return max((hi - lo) / (2 * _Z), 1e-6)


def _size_row(size: tuple[int, int], fit: dict[str, Any]) -> dict[str, Any]:
    rev, pl, plan = fit["reversal"], fit["power_law"], fit["planning"]
    observed = rev["status"] == "observed" and rev.get("depth") is not None
    return {"width": size[0] or None, "train_rows": size[1] or None, "n_runs": fit["n_runs"],
            "depths_swept": fit["depths_swept"], "reversal_status": rev["status"],
            "reversal_depth": rev["depth"] if observed else None,
            "reversal_depth_ci": rev.get("depth_ci") if observed else None,
            "slope": pl["slope"], "slope_ci": pl["slope_ci"],
            "depth_to_plan_for": plan["recommended_depth"], "depth_to_plan_for_ci": _plan_ci(plan),
            "plan_basis": plan["recommended_basis"]}


def _plan_ci(plan: dict[str, Any]) -> list[float] | None:
    """The bootstrap interval of the figure a size's depth to plan for comes from, widened by half a
    layer each side (depths are whole numbers, so [9, 9] means "9, to the nearest layer")."""
    basis = plan.get("recommended_basis") or ""
    fig = (plan.get("compute_optimal_depth") if basis.startswith("compute-optimal") else
           plan.get("last_depth_worth_adding") if basis.startswith("last depth") else None) or {}
    ci = fig.get("ci")
    if not ci or fig.get("depth") != plan.get("recommended_depth") or None in ci:
        return None
    return [max(0.5, ci[0] - 0.5), ci[1] + 0.5]


def _design(rows: Sequence[dict[str, Any]], axes: Sequence[str]) -> np.ndarray:
    return np.column_stack([np.ones(len(rows))] + [np.log([float(r[a]) for r in rows]) for a in axes])


def _wls(X: np.ndarray, y: np.ndarray, var: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Weighted least squares: (coefficients, covariance, reduced chi-square; nan with no dof)."""
    w = 1.0 / var
    XtW = X.T * w
    cov = np.linalg.pinv(XtW @ X)
    beta = cov @ (XtW @ y)
    dof = len(y) - X.shape[1]
    phi = float(np.sum(w * (y - X @ beta) ** 2) / dof) if dof > 0 else math.nan
    return beta, cov, phi


def _monotone(rows: list[dict[str, Any]], y: np.ndarray, se: np.ndarray, axes: Sequence[str]) -> bool:
    """No axis has steps of both signs larger than their combined spread (others held fixed)."""
    for a in axes:
        others = [b for b in axes if b != a]
        lines: dict[tuple, list[int]] = {}
        for i, r in enumerate(rows):
            lines.setdefault(tuple(r[b] for b in others), []).append(i)
        signs: set[int] = set()
        for idx in lines.values():
            idx = sorted(idx, key=lambda i: rows[i][a])
            for i, j in zip(idx, idx[1:]):
                step = y[j] - y[i]
                if abs(step) > math.hypot(se[i], se[j]):
                    signs.add(int(np.sign(step)))
        if len(signs) > 1:
            return False
    return True


def trend_of(rows: list[dict[str, Any]], key: str, axes: Sequence[str], rng: np.random.Generator,
             n_boot: int, *, log: bool) -> tuple[list[dict[str, Any]], _Trend | None]:
    """The rows with `key` and an interval on it, and their trend along size (None with fewer rows
    than the trend has terms plus one); on log `key` when `log`."""
    use = [r for r in rows if r.get(key) is not None and _se(r.get(f"{key}_ci"), log=log)]
    if len(use) < len(axes) + 1:
        return use, None
    y = np.array([math.log(r[key]) if log else float(r[key]) for r in use])
    se = np.array([_se(r[f"{key}_ci"], log=log) for r in use])
    return use, _Trend(use, y, se, axes, rng, n_boot)


class _Trend:
    """One quantity's trend along size: the fit, its replicates, predictions with intervals."""

    def __init__(self, rows: list[dict[str, Any]], y: np.ndarray, se: np.ndarray, axes: Sequence[str],
                 rng: np.random.Generator, n_boot: int) -> None:
        self.rows, self.y, self.axes = rows, y, list(axes)
        self.X = _design(rows, axes)
        self.beta, self.cov, self.phi = _wls(self.X, y, se ** 2)
        self.scale = max(1.0, self.phi) if math.isfinite(self.phi) else 1.0
        self.se = se * math.sqrt(self.scale)
        draws = y[None] + rng.standard_normal((n_boot, len(y))) * self.se[None]
        w = 1.0 / self.se ** 2
        A = np.linalg.pinv((self.X.T * w) @ self.X) @ (self.X.T * w)
        self.draws = draws @ A.T                                  # (n_boot, p)

    def exponents(self) -> dict[str, Any]:
        out = {}
        for j, a in enumerate(self.axes, start=1):
            lo, hi = np.percentile(self.draws[:, j], [2.5, 97.5])
            out[a] = {"exponent": float(self.beta[j]), "ci": [float(lo), float(hi)],
                      "se": float(math.sqrt(self.cov[j, j] * self.scale))}
        return out

    def significant(self) -> bool:
        return any(abs(e["exponent"]) > 2 * e["se"] for e in self.exponents().values())

    def scatter_exceeds_trend(self) -> bool:
        fitted = self.X @ self.beta
        resid_sd = float(np.sqrt(np.mean((self.y - fitted) ** 2)))
        return resid_sd > float(np.ptp(fitted))

    def predict(self, x: np.ndarray) -> tuple[float, list[float], np.ndarray]:
        """The trend at design row x: (point, 95 % interval, the chain bootstrap's replicates)."""
        reps = self.draws @ x
        lo, hi = np.percentile(reps, [2.5, 97.5])
        return float(x @ self.beta), [float(lo), float(hi)], reps


def _x(target: dict[str, float], axes: Sequence[str]) -> np.ndarray:
    return np.array([1.0] + [math.log(float(target[a])) for a in axes])


def _depth_extrapolation(pred: dict[str, Any], rows: list[dict[str, Any]]) -> None:
    """Flag a carried depth past the deepest depth any proxy swept, and say so in the notes."""
    deepest = pred["deepest_swept_depth"]
    span = pred["depth_to_plan_for_range"] or []
    figures = [v for v in (pred["depth_to_plan_for"], *span[1:], pred["reversal_depth"]) if v is not None]
    if deepest is None or not figures or max(figures) <= deepest:
        return
    pred["past_swept_depths"] = True
    pred["notes"].append(f"the carried depths reach K = {math.ceil(max(figures))}, past the deepest depth the proxies "
                         f"swept ({deepest}): there they rest on the carried law alone; sweep the proxies to about "
                         f"{math.ceil(max(figures))} layers before relying on them")


def _factors(target: dict[str, float], rows: list[dict[str, Any]], axes: Sequence[str]) -> dict[str, float]:
    return {a: float(target[a]) / max(float(r[a]) for r in rows) for a in axes if target.get(a)}


def target_error(target: dict[str, float | None], rows: list[dict[str, Any]]) -> str | None:
    """Why a target cannot be predicted from these sizes (None when it can be)."""
    if len(rows) < 2:
        return "one proxy size only: a target needs proxies at two or more sizes to carry the law along size"
    for a in AXES:
        value = target.get(a)
        if value is None:
            continue
        swept = {r[a] for r in rows if r[a]}
        if not swept:
            return f"target {a} given, but the runs do not record their {a}"
        if value < min(swept):
            return f"target {a} {value:g} is smaller than every proxy ({min(swept)}); plan from the proxy itself"
    return None


def fit_transfer(size_fits: dict[tuple[int, int], dict[str, Any]], *, target: dict[str, float | None] | None = None,
                 save_fraction: float = 0.05, n_boot: int = 400, seed: int = 0,
                 skipped: dict[tuple[int, int], str] | None = None) -> dict[str, Any]:
    """The `transfer` block of fit.json from per-size fits (size -> the size's fit block).

    Args:
        size_fits: each proxy size's fit (as `_fit_group` returns it).
        target: {"width": W, "train_rows": n} (either may be None), or None for no prediction.
        save_fraction: as for the per-size planning figures.
        n_boot: parametric bootstrap replicates of the chain.
        seed: their seed.
        skipped: sizes whose runs could not be fitted, with the reason.
    """
    rows = [_size_row(size, fit) for size, fit in sorted(size_fits.items())]
    out: dict[str, Any] = {"status": "single_size", "reason": "", "axes": [], "sizes": rows,
                           "skipped_sizes": [{"width": s[0] or None, "train_rows": s[1] or None, "reason": why}
                                             for s, why in sorted((skipped or {}).items())],
                           "reversal_depth_law": None, "slope_law": None, "plan_depth_law": None, "target": None}
    if len(rows) < 2:
        out["reason"] = "one proxy size: nothing to carry along"
        return out
    axes = [a for a in AXES if len({r[a] for r in rows}) > 1 and all(r[a] for r in rows)]
    out["axes"] = axes
    if not axes:
        out.update(status="not_supported", reason="the sizes differ on no axis the runs record (width, train_rows)")
        return out
    rng = np.random.default_rng(seed)
    reasons = []
    # the slope (every size has one), K* (sizes with an observed reversal), the depth to plan for
    # (sizes whose figure has an interval); drawn in this order from one generator
    _, slope_trend = trend_of(rows, "slope", axes, rng, n_boot, log=False)
    k_rows, k_trend = trend_of(rows, "reversal_depth", axes, rng, n_boot, log=True)
    _, plan_trend = trend_of(rows, "depth_to_plan_for", axes, rng, n_boot, log=True)
    for key, trend in (("slope_law", slope_trend), ("reversal_depth_law", k_trend), ("plan_depth_law", plan_trend)):
        if trend is not None:
            out[key] = {"intercept" if key == "slope_law" else "log_intercept": float(trend.beta[0]),
                        "by_axis": trend.exponents(), "reduced_chi2": None if math.isnan(trend.phi) else trend.phi}
    if k_trend is None:
        reasons.append(f"a reversal is observed at {len(k_rows)} of {len(rows)} sizes; the trend of K* along "
                       f"{' and '.join(axes)} needs {len(axes) + 1}")
    else:
        if not _monotone(k_rows, k_trend.y, k_trend.se, axes):
            reasons.append("the per-size K* do not follow a monotone law along size")
        elif not k_trend.significant() and k_trend.scatter_exceeds_trend():
            reasons.append("the per-size K* scatter more about their trend than the trend moves")
        if len(k_rows) == len(axes) + 1:
            out["warning"] = (f"{len(k_rows)} sizes for {len(axes) + 1} trend terms: the trend goes exactly "
                              "through them and nothing checks it; sweep one more size")
    out["status"] = "not_supported" if reasons else "supported"
    out["reason"] = "; ".join(reasons)
    if target and any(target.get(a) for a in AXES):
        out["target"] = _predict(target, rows, axes, k_trend if not reasons else None, slope_trend,
                                 save_fraction, out, plan_trend if not reasons else None)
    return out


def _predict(target: dict[str, float | None], rows: list[dict[str, Any]], axes: list[str],
             k_trend: _Trend | None, slope_trend: _Trend | None, save_fraction: float,
             block: dict[str, Any], plan_trend: _Trend | None = None) -> dict[str, Any]:
    given = {a: target.get(a) for a in AXES}
    # an axis the proxies do not vary along: the target must sit at the proxies' value to be predicted
    fixed = {a: {r[a] for r in rows} for a in AXES if a not in axes}
    off_axis = [a for a, v in given.items() if v and a in fixed and fixed[a] != {v}]
    point = {a: (given[a] if given[a] else max(r[a] for r in rows)) for a in axes}
    factors = _factors(point, rows, axes)
    pred: dict[str, Any] = {"width": given["width"], "train_rows": given["train_rows"],
                            "extrapolation_factor": factors, "reversal_depth": None, "reversal_depth_ci": None,
                            "slope": None, "slope_ci": None, "alpha": None, "alpha_ci": None,
                            "last_depth_worth_adding": None, "plan_basis": None, "depth_to_plan_for": None,
                            "depth_to_plan_for_range": None, "deepest_swept_depth": max(
                                (max(r["depths_swept"]) for r in rows if r.get("depths_swept")), default=None),
                            "past_swept_depths": False, "plan_settled": True, "notes": []}
    if off_axis:
        pred["notes"].append(f"the proxies all share one {' and '.join(off_axis)}, so the law cannot be carried "
                             f"along {' and '.join(off_axis)} to the target's; the prediction holds at the proxies' value")
    far = [a for a, f in factors.items() if f > FAR_FACTOR]
    if far:
        pred["notes"].append("STRONG WARNING: the target is " + ", ".join(f"{factors[a]:.0f}x the largest proxy's {a}"
                             for a in far) + f"; past {FAR_FACTOR:g}x a carried figure is a guess, not a plan")
    x = _x(point, axes)
    s_reps = None
    if slope_trend is not None:
        s, s_ci, s_reps = slope_trend.predict(x)
        pred.update(slope=s, slope_ci=s_ci, alpha=1 / (1 - s) if s < 0 else None,
                    alpha_ci=[1 / (1 - v) for v in s_ci] if s_ci[1] < 0 else None)
    if block["status"] != "supported" or k_trend is None:
        pred["notes"].append(f"transfer not supported by the data ({block['reason']}); no target depth is given")
        return pred
    log_k, log_ci, k_reps = k_trend.predict(x)
    pred["reversal_depth"], pred["reversal_depth_ci"] = math.exp(log_k), [math.exp(v) for v in log_ci]
    # The depth to plan for: the smallest of three carried figures, replicate by replicate: K*, the last
    # depth worth adding under T ~ K^s at the carried s, and (where the sizes' own depths to plan for
    # have intervals) their trend, which carries what the proxies' rule adds (the cost per update).
    point_figs, rep_figs, bases = [pred["reversal_depth"]], [np.exp(k_reps)], ["K*"]
    if s_reps is not None:
        worth = last_depth_worth_adding("power_law", np.column_stack([np.zeros(len(s_reps) + 1),
                                                                     np.r_[pred["slope"], s_reps]]), save_fraction)
        pred["last_depth_worth_adding"] = int(worth[0]) if np.isfinite(worth[0]) else None
        point_figs.append(worth[0])
        rep_figs.append(worth[1:])
        bases.append("the last depth worth adding at the carried s")
    if plan_trend is not None:
        log_p, _, p_reps = plan_trend.predict(x)
        point_figs.append(math.exp(log_p))
        rep_figs.append(np.exp(p_reps))
        bases.append("the trend of each proxy size's own depth to plan for ("
                     + "; ".join(sorted({r["plan_basis"] for r in plan_trend.rows if r.get("plan_basis")})) + ")")
    plan = np.nanmin(point_figs)
    reps = np.fmin.reduce(np.vstack(rep_figs), axis=0)
    reps = reps[np.isfinite(reps)]
    pred["depth_to_plan_for"] = max(1, round(plan))
    if len(reps):
        lo, hi = np.percentile(reps, [2.5, 97.5])
        pred["depth_to_plan_for_range"] = [max(1, math.floor(lo)), max(1, math.ceil(hi))]
    pred["plan_basis"] = "the smallest of " + ", ".join(bases) + ", each carried along size"
    span = pred["depth_to_plan_for_range"]
    if span and span[1] - span[0] > max(4, pred["depth_to_plan_for"]):
        pred["plan_settled"] = False
        pred["notes"].append(f"the carried depth to plan for is not pinned down: the data allow {span[0]} to {span[1]} "
                             "layers; plan from the range and the carried K*, or sweep more seeds per size to narrow it")
    _depth_extrapolation(pred, rows)
    return pred
