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

__all__ = ["AXES", "size_of", "fit_transfer", "target_error", "FAR_FACTOR", "SHORT_FACTOR"]

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
            "depth_to_plan_for": plan["recommended_depth"]}


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

    def predict(self, x: np.ndarray, extra_se: float = 0.0) -> tuple[float, list[float]]:
        point = float(x @ self.beta)
        reps = self.draws @ x
        if extra_se:
            reps = reps + np.random.default_rng(0).standard_normal(len(reps)) * extra_se
        lo, hi = np.percentile(reps, [2.5, 97.5])
        return point, [float(lo), float(hi)]


def _x(target: dict[str, float], axes: Sequence[str]) -> np.ndarray:
    return np.array([1.0] + [math.log(float(target[a])) for a in axes])


def _plan_depth(k_star: float | None, slope: float, save_fraction: float) -> int | None:
    """min(last depth worth adding under T ~ K^s, K*): the target's depth to plan for."""
    if slope >= 0:
        return 1
    worth = last_depth_worth_adding("power_law", np.array([[0.0, slope]]), save_fraction)[0]
    options = [v for v in (worth, k_star) if v is not None and np.isfinite(v)]
    return int(round(min(options))) if options else None


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
                           "reversal_depth_law": None, "slope_law": None, "target": None}
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
    # slope trend: every size has a slope
    s_rows = [r for r in rows if r["slope"] is not None and _se(r["slope_ci"], log=False)]
    slope_trend = None
    if len(s_rows) >= len(axes) + 1:
        slope_trend = _Trend(s_rows, np.array([r["slope"] for r in s_rows]),
                             np.array([_se(r["slope_ci"], log=False) for r in s_rows]), axes, rng, n_boot)
        out["slope_law"] = {"intercept": float(slope_trend.beta[0]), "by_axis": slope_trend.exponents(),
                            "reduced_chi2": None if math.isnan(slope_trend.phi) else slope_trend.phi}
    # K* trend: sizes with an observed reversal
    k_rows = [r for r in rows if r["reversal_depth"] and _se(r["reversal_depth_ci"], log=True)]
    k_trend = None
    if len(k_rows) < len(axes) + 1:
        reasons.append(f"a reversal is observed at {len(k_rows)} of {len(rows)} sizes; the trend of K* along "
                       f"{' and '.join(axes)} needs {len(axes) + 1}")
    else:
        y = np.log([r["reversal_depth"] for r in k_rows])
        se = np.array([_se(r["reversal_depth_ci"], log=True) for r in k_rows])
        k_trend = _Trend(k_rows, y, se, axes, rng, n_boot)
        out["reversal_depth_law"] = {"log_intercept": float(k_trend.beta[0]), "by_axis": k_trend.exponents(),
                                     "reduced_chi2": None if math.isnan(k_trend.phi) else k_trend.phi}
        if not _monotone(k_rows, y, k_trend.se, axes):
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
                                 save_fraction, out)
    return out


def _predict(target: dict[str, float | None], rows: list[dict[str, Any]], axes: list[str],
             k_trend: _Trend | None, slope_trend: _Trend | None, save_fraction: float,
             block: dict[str, Any]) -> dict[str, Any]:
    given = {a: target.get(a) for a in AXES}
    # an axis the proxies do not vary along: the target must sit at the proxies' value to be predicted
    fixed = {a: {r[a] for r in rows} for a in AXES if a not in axes}
    off_axis = [a for a, v in given.items() if v and a in fixed and fixed[a] != {v}]
    point = {a: (given[a] if given[a] else max(r[a] for r in rows)) for a in axes}
    factors = _factors(point, rows, axes)
    pred: dict[str, Any] = {"width": given["width"], "train_rows": given["train_rows"],
                            "extrapolation_factor": factors, "reversal_depth": None, "reversal_depth_ci": None,
                            "slope": None, "slope_ci": None, "alpha": None, "alpha_ci": None,
                            "last_depth_worth_adding": None, "depth_to_plan_for": None,
                            "depth_to_plan_for_range": None, "notes": []}
    if off_axis:
        pred["notes"].append(f"the proxies all share one {' and '.join(off_axis)}, so the law cannot be carried "
                             f"along {' and '.join(off_axis)} to the target's; the prediction holds at the proxies' value")
    far = [a for a, f in factors.items() if f > FAR_FACTOR]
    if far:
        pred["notes"].append("STRONG WARNING: the target is " + ", ".join(f"{factors[a]:.0f}x the largest proxy's {a}"
                             for a in far) + f"; past {FAR_FACTOR:g}x a carried figure is a guess, not a plan")
    x = _x(point, axes)
    if slope_trend is not None:
        s, s_ci = slope_trend.predict(x)
        pred.update(slope=s, slope_ci=s_ci, alpha=1 / (1 - s) if s < 0 else None,
                    alpha_ci=[1 / (1 - v) for v in s_ci] if s_ci[1] < 0 else None)
    if block["status"] != "supported" or k_trend is None:
        pred["notes"].append(f"transfer not supported by the data ({block['reason']}); no target depth is given")
        return pred
    log_k, log_ci = k_trend.predict(x)
    pred["reversal_depth"], pred["reversal_depth_ci"] = math.exp(log_k), [math.exp(v) for v in log_ci]
    if pred["slope"] is not None:
        worth = last_depth_worth_adding("power_law", np.array([[0.0, pred["slope"]]]), save_fraction)[0]
        pred["last_depth_worth_adding"] = int(worth) if np.isfinite(worth) else None
        pred["depth_to_plan_for"] = _plan_depth(pred["reversal_depth"], pred["slope"], save_fraction)
        ends = {_plan_depth(k, s, save_fraction) for k in pred["reversal_depth_ci"] for s in pred["slope_ci"]}
        ends.discard(None)
        if ends:
            pred["depth_to_plan_for_range"] = [min(ends), max(ends)]
    return pred
