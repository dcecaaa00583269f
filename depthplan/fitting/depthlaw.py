"""The depth law measured on one group of runs, with bootstrap intervals (no torch).

`summarize_depths` gives the per-depth table; `power_law_block` and
`_reversal_block` fit the estimators of `depthplan.estimators` to the runs
and refit them on bootstrap resamples (`_draws`: seeds within each depth, or
residuals where a depth has one run; `percentile_ci`: percentile intervals of the
draws). `depthplan.planning` reads the planning figures off the same draws,
and `depthplan.fitting` decides which model a group's figures use and
assembles fit.json.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
from scipy import stats

from ..records import RunResult
from .accuracy import accuracy_fields
from .estimators import (
    _breakpoint_grid,
    _design_power,
    _segmented_profile,
    _tobit_batch,
    bic,
    fit_power_law,
    fit_segmented,
)

# ---------------------------------------------------------------- per-depth table

def summarize_depths(runs: Sequence[RunResult],
                     stuck: Sequence[RunResult] = ()) -> list[dict[str, Any]]:
    """One row per depth: counts by status, median and quartiles of T, validation accuracy.

    Quantiles are taken over converged and censored runs with censored ones
    ranked last: the median is given only where under half the runs are
    censored, the quartiles only where under a quarter are; otherwise they are
    None and `median_note` says "more than the budget". Diverged runs are
    counted but have no T. Runs in `stuck` (`depthplan.fitting.stuck`) are
    counted among the censored and in `stuck` / `stuck_rate` (of the finished
    runs), but left out of the quantiles.
    """
    stuck_ids = {id(r) for r in stuck}
    rows = []
    for k in sorted({r.depth for r in runs}):
        at = [r for r in runs if r.depth == k]
        n_stuck = sum(id(r) in stuck_ids for r in at)
        n_done = sum(r.status in ("converged", "censored") for r in at)
        finished = [r for r in at if r.status in ("converged", "censored")
                    and id(r) not in stuck_ids]
        n_cens = sum(r.status == "censored" for r in finished)
        # censored runs ranked last; by the rules below no quantile reaches them
        top = 2.0 * max([r.iterations for r in finished], default=1.0)
        values = np.sort([r.iterations if r.status == "converged" else top for r in finished])
        n = len(values)
        median = q25 = q75 = None
        if n and 2 * n_cens < n:
            median = float(np.quantile(values, 0.5))
        if n and 4 * n_cens < n:
            q25, q75 = float(np.quantile(values, 0.25)), float(np.quantile(values, 0.75))
        budgets = [r.iterations for r in at if r.status == "censored"]
        sec = [r.seconds_per_update for r in at
               if isinstance(r.seconds_per_update, (int, float)) and r.seconds_per_update > 0]
        rows.append({
            "depth": int(k), "runs": len(at),
            "converged": sum(r.status == "converged" for r in at), "censored": n_cens + n_stuck,
            "diverged": sum(r.status == "diverged" for r in at),
            "median": median, "q25": q25, "q75": q75,
            "median_note": "" if median is not None else (
                "more than the budget" if n else "no finished run"),
            "quartile_note": "" if q75 is not None else (
                "more than the budget" if n else "no finished run"),
            "budget": float(min(budgets)) if budgets else None,
            "seconds_per_update": float(np.median(sec)) if sec else None,
            **accuracy_fields(at),
            "stuck": n_stuck, "stuck_rate": n_stuck / n_done if n_done else None,
        })
    return rows


# ---------------------------------------------------------------- bootstrap

def _draws(x: np.ndarray, y: np.ndarray, c: np.ndarray, n_boot: int,
           rng: np.random.Generator, fitted: np.ndarray,
           n_params: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """Bootstrap copies of the runs: (x of the copies (m,), Y (n_boot, m), C (n_boot, m), method).

    Resamples runs within each depth (Efron and Tibshirani 1993), drawing
    n_k - 1 of the n_k runs of a depth: that makes the bootstrap variance of a
    depth's mean unbiased (McCarthy and Snowden 1985), where drawing n_k
    shrinks it by (n_k - 1) / n_k and leaves intervals too narrow with few
    seeds. The design stays the same for every copy. Where some depth has a
    single run, resamples residuals of the uncensored runs around `fitted`
    instead, a censored run staying censored at its budget when its draw
    exceeds it.
    """
    groups = [np.flatnonzero(x == v) for v in np.unique(x)]
    if min(len(g) for g in groups) >= 2:
        cols = [rng.choice(g, size=(n_boot, len(g) - 1)) for g in groups]
        idx = np.concatenate(cols, axis=1)
        return x[idx[0]], y[idx], c[idx], "seeds_within_depth"
    resid = (y - fitted)[~c]
    if len(resid) > n_params:
        resid = resid * math.sqrt(len(resid) / (len(resid) - n_params))
    ystar = fitted[None] + rng.choice(resid, size=(n_boot, len(x)))
    over = c[None] & (ystar >= y[None])
    return x, np.where(over, y[None], ystar), over, "residuals"


def percentile_ci(values: np.ndarray, level: float = 0.95) -> list[float] | None:
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if len(v) < 10:
        return None
    lo, hi = np.quantile(v, [(1 - level) / 2, (1 + level) / 2])
    return [float(lo), float(hi)]


def alpha_of(s: float | None) -> float | None:
    return None if s is None or not s < 1 else 1.0 / (1.0 - s)


# ---------------------------------------------------------------- one group of runs

@dataclass
class RunArrays:
    K: np.ndarray
    T: np.ndarray
    C: np.ndarray

    @property
    def x(self) -> np.ndarray:
        return np.log(self.K)

    @property
    def y(self) -> np.ndarray:
        return np.log(self.T)

    def subset(self, mask: np.ndarray) -> "RunArrays":
        return RunArrays(self.K[mask], self.T[mask], self.C[mask])


def power_law_block(d: RunArrays, n_boot: int, seed: int) -> tuple[dict[str, Any], np.ndarray]:
    """The power law over the runs in `d`, with bootstrap; returns (fields, (B, 2) draws)."""
    pl = fit_power_law(d.K, d.T, d.C)
    rng = np.random.default_rng(seed)
    fitted = pl.intercept + pl.slope * d.x
    xb, Yb, Cb, method = _draws(d.x, d.y, d.C, n_boot, rng, fitted, 2)
    res = _tobit_batch(_design_power(xb), Yb, Cb, max_iter=60)
    draws = np.where(res["converged"][:, None], res["beta"], np.nan)
    t = stats.t.ppf(0.975, max(pl.n - 2, 1))
    boot_ci = percentile_ci(draws[:, 1])
    ci_t = [pl.slope - t * pl.slope_se, pl.slope + t * pl.slope_se]
    ok = np.isfinite(draws).all(1)
    cov = np.cov(draws[ok].T) if ok.sum() > 10 else np.array(pl.cov)
    fields_ = {
        "slope": pl.slope, "slope_se": pl.slope_se, "slope_ci": boot_ci or ci_t,
        "slope_ci_analytic": ci_t, "intercept": pl.intercept, "intercept_se": pl.intercept_se,
        "cov": cov.tolist(), "sigma": pl.sigma, "r2": pl.r2, "loglik": pl.loglik,
        "method": pl.method, "converged": pl.converged,
        "depths_used": sorted({int(k) for k in d.K}), "n_runs": pl.n,
        "n_censored": pl.n_censored, "ci_method": method if boot_ci else "t",
        "n_boot_failed": int((~ok).sum()),
    }
    return fields_, draws


def _gain(block: dict[str, Any]) -> bool:
    s, ci, ci_t = block["slope"], block["slope_ci"], block["slope_ci_analytic"]
    return bool(s < 0 and ci[1] < 0 and ci_t[1] < 0)


def _with_alpha(block: dict[str, Any]) -> dict[str, Any]:
    gain = _gain(block)
    block["alpha"] = alpha_of(block["slope"]) if gain else None
    block["alpha_ci"] = [alpha_of(block["slope_ci"][0]), alpha_of(block["slope_ci"][1])] if gain else None
    return block


def _location(d: RunArrays, depths: list[int]) -> np.ndarray:
    """Per-depth median log T, censored runs ranked last (inf where unknown)."""
    out = []
    for k in depths:
        m = d.K == k
        v = np.sort(np.where(d.C[m], np.inf, d.y[m]))
        out.append(v[(len(v) - 1) // 2] if len(v) else np.inf)
    return np.array(out)


def _reversal_block(d: RunArrays, depths: list[int], n_boot: int,
                    seed: int) -> tuple[dict[str, Any], np.ndarray | None]:
    """Segmented fit on every depth against the single law; returns (fields, (B, 4) draws)."""
    single = fit_power_law(d.K, d.T, d.C)
    out: dict[str, Any] = {"bic_single": bic(single.loglik, 3, len(d.K)), "bic_segmented": None,
                           "depth": None, "depth_ci": None, "falling_slope": None,
                           "rising_slope": None, "rising_slope_ci": None, "n_depths_past": None,
                           "smooth_depth": None, "candidate": False}
    if len(depths) < 4:
        out["reason"] = "fewer than four depths: no segmented fit"
        return out, None
    seg = fit_segmented(d.K, d.T, d.C)
    psi = math.log(seg.breakpoint)
    d_coef = seg.rising_slope - seg.falling_slope
    fitted = seg.intercept + seg.falling_slope * d.x + d_coef * np.clip(d.x - psi, 0, None)
    xb, Yb, Cb, _ = _draws(d.x, d.y, d.C, n_boot, np.random.default_rng(seed + 1), fitted, 4)
    psi_b, beta_b, _ = _segmented_profile(xb, Yb, Cb, _breakpoint_grid(d.x))
    draws = np.column_stack([beta_b, psi_b])                       # (a, s, d, psi)
    n_past = sum(k > seg.breakpoint * (1 + 1e-9) for k in depths)
    r_ci = percentile_ci(beta_b[:, 1] + beta_b[:, 2])
    out.update(bic_segmented=bic(seg.loglik, 5, len(d.K)), falling_slope=seg.falling_slope,
               rising_slope=seg.rising_slope, rising_slope_ci=r_ci, n_depths_past=n_past,
               breakpoint=seg.breakpoint, breakpoint_ci=percentile_ci(np.exp(psi_b)),
               point=[seg.intercept, seg.falling_slope, d_coef, psi])
    reasons = []
    if not seg.falling_slope < 0:
        reasons.append("no falling part before the break")
    if not (seg.rising_slope > 0 and r_ci is not None and r_ci[0] > 0):
        reasons.append("the rising slope's interval does not lie above 0")
    k_low = depths[int(np.argmin(_location(d, depths)))]
    n_past_low = sum(k > k_low for k in depths)
    if min(n_past, n_past_low) < 2:
        reasons.append(f"only {min(n_past, n_past_low)} swept depth past the minimum")
    if not out["bic_segmented"] < out["bic_single"]:
        reasons.append("BIC prefers the single power law")
    out["candidate"] = not reasons
    out["reason"] = "; ".join(reasons)
    return out, draws
