"""Fit the depth scaling law to measured updates-to-convergence (numpy/scipy, no torch).

`fit_runs` turns run records into the content of `fit.json`; `fit_path` loads a
results folder or measurements table (see `depthplan.tables`), fits and writes
the file; `format_summary` gives the short text the CLI prints. The estimators
underneath take plain arrays and are public so that tests and the report can
use them: `fit_power_law` (Tobit on log T; ordinary least squares when nothing
is censored), `fit_segmented` (continuous broken stick, Muggeo 2003),
`fit_two_term` (T = A K**s + B K**r), and the probe measures
`growth_exponent`, `transition_step`, `snr_drop_db`.

fit.json, schema "depthplan-fit/1" (full field list in docs/fit-json.md).
Numbers are JSON numbers, null where undefined; never NaN.

    schema            "depthplan-fit/1"
    source            what was fitted (path as given)
    input             {kind: results_folder|table, sweep_name, max_updates} (fit_path only)
    group             {lr_mode, learning_rate}: the runs the top-level fields describe
    depth_gain        true when the slope and its intervals lie below 0
    depths_swept, n_runs, eval_every
    per_depth[]       {depth, runs, converged, censored, diverged, median, q25, q75,
                       median_note, quartile_note, budget, seconds_per_update}
    power_law         {slope, slope_se, slope_ci, slope_ci_analytic, intercept, cov,
                       sigma, alpha, alpha_ci, r2, method, depths_used, n_runs,
                       n_censored, without_shallowest{...}}
    reversal          {status: observed|beyond_range|none, depth, depth_ci,
                       falling_slope, rising_slope, rising_slope_ci, bic_single,
                       bic_segmented, n_depths_past, smooth_depth, smooth_model,
                       rise_suspected, note}
    planning          {save_fraction, last_depth_worth_adding{depth, ci, extrapolated},
                       compute_optimal_depth{depth, ci, extrapolated, cost_model, note},
                       recommended_depth, recommended_basis}
    diffusion         null, or {n_runs, layers[], late_exponent_median,
                       transition_step_median, snr_drop_db_median, alpha}
    curve             {model, depths, median, lo, hi}: fitted T and its 95 % band
    by_learning_rate  [] or one full fit (without this field) per rate group
    lr_interaction    null, or {primary, slopes[], lr_exponent, message}
    bootstrap         {n_boot, seed, method, n_failed}
    warnings[]        plain sentences
"""
from __future__ import annotations

import json
import math
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from scipy import optimize, special, stats

from .errors import ConvergenceWarning, DataError
from .records import STATUSES, RunResult
from .tables import eval_interval, load_runs, read_sweep_info

SCHEMA = "depthplan-fit/1"
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
_K_MAX = 1000          # deepest depth the planning figures search
_GRID = 40             # breakpoint grid points of the segmented profile


# ---------------------------------------------------------------- Tobit core

def _tobit_batch(X: np.ndarray, Y: np.ndarray, C: np.ndarray, *, max_iter: int = 100,
                 tol: float = 1e-10, want_cov: bool = False) -> dict[str, np.ndarray]:
    """Maximum-likelihood linear fits of many problems that share one design.

    Model: Y[b, i] = X[i] @ beta[b] + N(0, sigma[b]**2); where C[b, i] the value
    Y[b, i] is a right-censoring point (the truth is at least that). Newton's
    method in Olsen's (1978) parametrisation gamma = beta / sigma,
    theta = 1 / sigma, where the log-likelihood is concave, started from
    ordinary least squares (which is the answer where nothing is censored).

    Args:
        X: (n, p) design. Y: (B, n) log T. C: (B, n) bool, censored.

    Returns:
        dict with beta (B, p), sigma (B,), loglik (B,), converged (B,) and,
        with want_cov, cov (B, p, p): the covariance of beta from the observed
        information, scaled by n / (n - p) so that it equals the OLS covariance
        when nothing is censored.
    """
    Y = np.atleast_2d(np.asarray(Y, float))
    C = np.broadcast_to(np.asarray(C, bool), Y.shape)
    n, p = X.shape
    beta = Y @ np.linalg.pinv(X).T                        # (B, p)
    rss = ((Y - beta @ X.T) ** 2).sum(1)
    sigma = np.sqrt(np.maximum(rss / n, 1e-12))
    out = {"beta": beta, "sigma": sigma, "converged": np.ones(len(Y), bool),
           "loglik": -0.5 * n * (2 * _LOG_SQRT_2PI + np.log(sigma ** 2) + 1.0)}
    if want_cov:
        xtx_inv = np.linalg.pinv(X.T @ X)
        out["cov"] = (rss / max(n - p, 1))[:, None, None] * xtx_inv[None]
    if not C.any():
        return out
    n_unc = (~C).sum(1)
    A = np.concatenate([np.broadcast_to(X, Y.shape + (p,)), -Y[..., None]], axis=2)
    phi = np.concatenate([beta / sigma[:, None], 1.0 / sigma[:, None]], axis=1)
    ll = _olsen_loglik(phi, A, C, n_unc)
    done = ~C.any(1)
    ridge = 1e-12 * np.eye(p + 1)
    for _ in range(max_iter):
        idx = np.flatnonzero(~done)
        if not len(idx):
            break
        g, H = _olsen_derivatives(phi[idx], A[idx], C[idx], n_unc[idx])
        step = np.linalg.solve(-H + ridge, g[..., None])[..., 0]
        small = (g * step).sum(1) < tol          # Newton decrement
        done[idx[small]] = True
        idx, step = idx[~small], step[~small]
        t = np.ones(len(idx))
        for _ in range(40):                      # backtracking, row by row
            trial = phi[idx] + t[:, None] * step
            new = _olsen_loglik(trial, A[idx], C[idx], n_unc[idx])
            ok = np.isfinite(new) & (new >= ll[idx] - 1e-12 * np.abs(ll[idx]))
            if ok.all():
                break
            t = np.where(ok, t, t / 2)
        phi[idx[ok]], ll[idx[ok]] = trial[ok], new[ok]
        done[idx[~ok]] = True                    # no ascent left: at the optimum
    theta = phi[:, -1]
    out.update(beta=phi[:, :-1] / theta[:, None], sigma=1.0 / theta, loglik=ll,
               converged=done & (n_unc > 0))
    if want_cov:
        active = C.any(1)
        _, H = _olsen_derivatives(phi, A, C, n_unc)
        cov_phi = np.linalg.pinv(-H)
        J = np.concatenate([np.eye(p)[None] / theta[:, None, None],
                            -(phi[:, :-1] / theta[:, None] ** 2)[..., None]], axis=2)
        cov = J @ cov_phi @ J.transpose(0, 2, 1) * (n / max(n - p, 1))
        out["cov"] = np.where(active[:, None, None], cov, out["cov"])
    return out


def _olsen_loglik(phi: np.ndarray, A: np.ndarray, C: np.ndarray, n_unc: np.ndarray) -> np.ndarray:
    """Tobit log-likelihood per row; phi (B, p+1) = (gamma, theta), A (B, n, p+1) = [X, -Y]."""
    u = np.einsum("bnk,bk->bn", A, phi)                     # x @ gamma - theta * y
    theta = phi[:, -1]
    with np.errstate(divide="ignore", invalid="ignore"):
        ll = (np.where(C, special.log_ndtr(u), -0.5 * u ** 2).sum(1)
              + n_unc * (np.log(theta) - _LOG_SQRT_2PI))
    return np.where(theta > 0, ll, -np.inf)


def _olsen_derivatives(phi: np.ndarray, A: np.ndarray, C: np.ndarray,
                       n_unc: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gradient (B, p+1) and Hessian (B, p+1, p+1) of `_olsen_loglik`."""
    u = np.einsum("bnk,bk->bn", A, phi)
    theta = phi[:, -1]
    lam = np.exp(-0.5 * u ** 2 - _LOG_SQRT_2PI - special.log_ndtr(u))  # inverse Mills ratio
    a = np.where(C, lam, -u)
    w = np.where(C, lam * (lam + u), 1.0)
    g = np.einsum("bn,bnk->bk", a, A)
    g[:, -1] += n_unc / theta
    H = -np.einsum("bn,bnk,bnl->bkl", w, A, A)
    H[:, -1, -1] -= n_unc / theta ** 2
    return g, H


def _design_power(x: np.ndarray) -> np.ndarray:
    return np.column_stack([np.ones_like(x), x])


def _design_segmented(x: np.ndarray, psi: float) -> np.ndarray:
    return np.column_stack([np.ones_like(x), x, np.clip(x - psi, 0.0, None)])


def _prepare(depths: Sequence[float], iterations: Sequence[float],
             censored: Sequence[bool] | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    x = np.log(np.asarray(depths, float))
    y = np.log(np.asarray(iterations, float))
    c = np.zeros(len(x), bool) if censored is None else np.asarray(censored, bool)
    if not (len(x) == len(y) == len(c)):
        raise ValueError("depths, iterations and censored must have the same length")
    if not (np.isfinite(x).all() and np.isfinite(y).all()):
        raise ValueError("depths and iterations must be positive and finite")
    return x, y, c


# ---------------------------------------------------------------- single power law

@dataclass(frozen=True)
class PowerLawFit:
    """log T = intercept + slope * log K + N(0, sigma**2), right-censored runs included."""

    slope: float
    intercept: float
    slope_se: float
    intercept_se: float
    cov: tuple[tuple[float, float], tuple[float, float]]   # of (intercept, slope)
    sigma: float             # residual sd of log T (maximum likelihood)
    r2: float                # latent R^2: var(fit) / (var(fit) + sigma^2); OLS R^2 uncensored
    loglik: float
    n: int
    n_censored: int
    method: str              # "ols" (nothing censored) or "tobit"
    converged: bool


def fit_power_law(depths: Sequence[float], iterations: Sequence[float],
                  censored: Sequence[bool] | None = None, *, max_iter: int = 100) -> PowerLawFit:
    """Fit T = c * K**s on log-log axes, censored runs as lower bounds (Tobit).

    With nothing censored this is ordinary least squares on log T, with the
    usual standard errors (n - 2 degrees of freedom).

    Args:
        depths: K of each run. iterations: T of each run (the budget where
            censored). censored: True where the run hit its budget.
        max_iter: Newton iterations allowed for the censored likelihood.

    Returns:
        A `PowerLawFit`. Warns `ConvergenceWarning` when the censored fit did
        not converge (too few converged runs; raise the budget).
    """
    x, y, c = _prepare(depths, iterations, censored)
    if len(np.unique(x)) < 2 or len(x) < 3:
        raise ValueError("a power law needs runs at two depths or more, three runs or more")
    X = _design_power(x)
    res = _tobit_batch(X, y[None], c[None], max_iter=max_iter, want_cov=True)
    (a, s), sigma, cov = res["beta"][0], float(res["sigma"][0]), res["cov"][0]
    converged = bool(res["converged"][0])
    if not converged:
        warnings.warn("the censored power-law fit did not converge; too few runs converged "
                      "within the budget: raise max_updates or add seeds",
                      ConvergenceWarning, stacklevel=2)
    fitted = a + s * x
    var_fit = float(np.mean((fitted - fitted.mean()) ** 2))
    return PowerLawFit(
        slope=float(s), intercept=float(a), slope_se=float(math.sqrt(max(cov[1, 1], 0.0))),
        intercept_se=float(math.sqrt(max(cov[0, 0], 0.0))),
        cov=((float(cov[0, 0]), float(cov[0, 1])), (float(cov[1, 0]), float(cov[1, 1]))),
        sigma=sigma, r2=var_fit / (var_fit + sigma ** 2) if var_fit + sigma ** 2 > 0 else 0.0,
        loglik=float(res["loglik"][0]), n=len(x), n_censored=int(c.sum()),
        method="tobit" if c.any() else "ols", converged=converged)


def bic(loglik: float, n_params: int, n: int) -> float:
    """Bayesian information criterion, k log n - 2 log L (Schwarz 1978): lower is better."""
    return n_params * math.log(n) - 2.0 * loglik


# ---------------------------------------------------------------- segmented (broken stick)

@dataclass(frozen=True)
class SegmentedFit:
    """log T = a + s x + (r - s) (x - psi)+ with x = log K; continuous at K = exp(psi)."""

    breakpoint: float        # exp(psi), a depth
    falling_slope: float     # s, before the break
    rising_slope: float      # r, after the break
    intercept: float
    sigma: float
    loglik: float
    n: int
    n_iter: int              # Muggeo iterations taken after the grid search
    converged: bool


def _breakpoint_grid(x: np.ndarray, n_grid: int = _GRID) -> np.ndarray:
    """Candidate log-breakpoints from the second to the second-deepest depth."""
    xs = np.unique(x)
    if len(xs) < 4:
        raise ValueError("a segmented fit needs runs at four depths or more")
    return np.linspace(xs[1], xs[-2], n_grid)


def _segmented_profile(x: np.ndarray, Y: np.ndarray, C: np.ndarray,
                       grid: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Profile the broken stick over `grid` for each row of Y.

    Returns the refined log-breakpoint (B,), the parameters (a, s, d) at the
    best grid point (B, 3), and the best log-likelihood (B,).
    """
    lls, betas = [], []
    for psi in grid:
        res = _tobit_batch(_design_segmented(x, psi), Y, C, max_iter=60)
        lls.append(res["loglik"])
        betas.append(res["beta"])
    ll = np.array(lls)                                   # (G, B)
    beta = np.array(betas)                               # (G, B, 3)
    j = np.argmax(ll, axis=0)
    rows = np.arange(ll.shape[1])
    psi = grid[j].copy()
    # parabola through the best grid point and its neighbours
    inner = (j > 0) & (j < len(grid) - 1)
    jj = np.clip(j, 1, len(grid) - 2)
    l0, l1, l2 = ll[jj - 1, rows], ll[jj, rows], ll[jj + 1, rows]
    curv = l0 - 2 * l1 + l2
    h = grid[1] - grid[0]
    with np.errstate(divide="ignore", invalid="ignore"):
        shift = np.where(curv < 0, 0.5 * h * (l0 - l2) / curv, 0.0)
    psi = np.where(inner & np.isfinite(shift), grid[jj] + np.clip(shift, -h, h), psi)
    return psi, beta[j, rows], ll[j, rows]


def fit_segmented(depths: Sequence[float], iterations: Sequence[float],
                  censored: Sequence[bool] | None = None, *, max_iter: int = 30) -> SegmentedFit:
    """Continuous segmented regression of log T on log K with one unknown breakpoint.

    A grid search of the profile likelihood finds the neighbourhood; Muggeo's
    (2003) iteration then refines the breakpoint: fit the linear model with
    U = (x - psi)+ and V = -1[x > psi], move psi by gamma_V / beta_U, repeat.
    Censored runs enter through the Tobit likelihood as in `fit_power_law`.
    The breakpoint is kept between the second and the second-deepest depth.
    """
    x, y, c = _prepare(depths, iterations, censored)
    grid = _breakpoint_grid(x, 4 * _GRID)
    psi_arr, beta_arr, ll_arr = _segmented_profile(x, y[None], c[None], grid)
    psi, ll = float(psi_arr[0]), -np.inf
    best = None
    n_iter, converged = 0, False
    for n_iter in range(1, max_iter + 1):
        res = _tobit_batch(_design_segmented(x, psi), y[None], c[None])
        if res["loglik"][0] >= ll - 1e-12:
            best, ll = (psi, res), float(res["loglik"][0])
        U = np.clip(x - psi, 0.0, None)
        V = -(x > psi).astype(float)
        lin = _tobit_batch(np.column_stack([np.ones_like(x), x, U, V]), y[None], c[None])
        d, g = lin["beta"][0, 2], lin["beta"][0, 3]
        if abs(d) < 1e-12:
            break
        new = float(np.clip(psi + g / d, grid[0], grid[-1]))
        if abs(new - psi) < 1e-8:
            converged = True
            break
        psi = new
    if best is None or float(ll_arr[0]) > ll + 1e-9:   # the grid point was better
        psi = float(psi_arr[0])
        best = (psi, _tobit_batch(_design_segmented(x, psi), y[None], c[None]))
    psi, res = best
    a, s, d = res["beta"][0]
    return SegmentedFit(
        breakpoint=float(math.exp(psi)), falling_slope=float(s), rising_slope=float(s + d),
        intercept=float(a), sigma=float(res["sigma"][0]), loglik=float(res["loglik"][0]),
        n=len(x), n_iter=n_iter, converged=converged and bool(res["converged"][0]))


# ---------------------------------------------------------------- smooth two-term model

@dataclass(frozen=True)
class TwoTermFit:
    """T = A K**s + B K**r with A, B > 0 and s < 0 < r; minimum at `minimum_depth`."""

    A: float
    B: float
    s: float
    r: float
    sigma: float
    loglik: float
    minimum_depth: float     # (-s A / (r B)) ** (1 / (r - s))
    converged: bool


def _two_term_nll(theta: np.ndarray, x: np.ndarray, y: np.ndarray,
                  c: np.ndarray) -> tuple[float, np.ndarray]:
    """Negative Tobit log-likelihood of log T = log(A K^s + B K^r) and its gradient.

    theta = (log A, log B, u, v, log sigma) with s = -exp(u), r = exp(v).
    """
    la, lb, u, v, ls = theta
    s, r, sigma = -math.exp(u), math.exp(v), math.exp(ls)
    t1, t2 = la + s * x, lb + r * x
    mu = np.logaddexp(t1, t2)
    w1 = np.exp(t1 - mu)
    w2 = 1.0 - w1
    z = (y - mu) / sigma
    log_cdf = special.log_ndtr(-z)                       # P(log T >= c) for censored
    lam = np.exp(-0.5 * z ** 2 - _LOG_SQRT_2PI - log_cdf)
    ll = np.where(c, log_cdf, -ls - _LOG_SQRT_2PI - 0.5 * z ** 2)
    dmu = np.where(c, lam, z) / sigma                    # d ll / d mu
    dls = np.where(c, lam * z, z ** 2 - 1.0)             # d ll / d log sigma
    grad = np.array([(dmu * w1).sum(), (dmu * w2).sum(), (dmu * w1 * x).sum() * s,
                     (dmu * w2 * x).sum() * r, dls.sum()])
    return -float(ll.sum()), -grad


def fit_two_term(depths: Sequence[float], iterations: Sequence[float],
                 censored: Sequence[bool] | None = None, *,
                 start: tuple[float, float] | None = None) -> TwoTermFit:
    """Fit the smooth two-term model T = A K**s + B K**r by maximum likelihood on log T.

    Args:
        start: optional (s, r) to start from (e.g. the segmented slopes).

    Returns:
        The best of several starts; `converged` is False when no start converged.
    """
    x, y, c = _prepare(depths, iterations, censored)
    slopes = [(-1.0, 1.0), (-0.5, 2.0), (-2.0, 0.5)]
    if start is not None and start[0] < 0 < start[1]:
        slopes.insert(0, start)
    sd = max(float(np.std(y)), 0.05)
    best = None
    for s0, r0 in slopes:
        # split T evenly between the two terms at the deepest-but-one depth
        xm = float(np.median(x))
        ym = float(np.median(y))
        theta0 = np.array([ym - math.log(2) - s0 * xm, ym - math.log(2) - r0 * xm,
                           math.log(-s0), math.log(r0), math.log(sd)])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            res = optimize.minimize(_two_term_nll, theta0, args=(x, y, c), jac=True,
                                    method="L-BFGS-B",
                                    bounds=[(None, None), (None, None), (-6, 2.5), (-6, 2.5),
                                            (-12, 3)])
        if np.isfinite(res.fun) and (best is None or res.fun < best.fun):
            best = res
    assert best is not None
    la, lb, u, v, ls = best.x
    s, r = -math.exp(u), math.exp(v)
    A, B = math.exp(la), math.exp(lb)
    k_min = (-s * A / (r * B)) ** (1.0 / (r - s))
    return TwoTermFit(A=A, B=B, s=s, r=r, sigma=math.exp(ls), loglik=-float(best.fun),
                      minimum_depth=float(k_min), converged=bool(best.success))


# ---------------------------------------------------------------- probes

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
    t = np.asarray(steps, float)
    q = np.asarray(snr_db, float)
    ok = np.isfinite(t) & np.isfinite(q) & (t > 0)
    t, q = t[ok], q[ok]
    if len(t) < 4:
        return t, q, math.nan, math.nan
    order = np.argsort(t)
    t, q = t[order], q[order]
    m = max(1, int(round(edge * len(t))))
    return t, q, float(np.median(q[:m])), float(np.median(q[-m:]))


def snr_drop_db(steps: Sequence[float], snr_db: Sequence[float]) -> float:
    """Fall of the gradient SNR (dB) from its early level to its late level.

    Levels are medians of the first and last fifth of the probes; NaN with
    fewer than four usable probes.
    """
    _, _, early, late = _snr_levels(steps, snr_db)
    return early - late


def transition_step(steps: Sequence[float], snr_db: Sequence[float], *,
                    min_drop_db: float = 3.0) -> float:
    """Step at which the SNR first falls below halfway between its early and late levels.

    Interpolated on log-step axes. NaN when the SNR falls by less than
    `min_drop_db` (no drift-to-diffusion transition to speak of).
    """
    t, q, early, late = _snr_levels(steps, snr_db)
    if not (early - late >= min_drop_db):
        return math.nan
    mid = 0.5 * (early + late)
    below = np.flatnonzero(q < mid)
    i = int(below[0])
    if i == 0:
        return float(t[0])
    lt0, lt1 = math.log(t[i - 1]), math.log(t[i])
    frac = (q[i - 1] - mid) / (q[i - 1] - q[i])
    return float(math.exp(lt0 + frac * (lt1 - lt0)))


# ---------------------------------------------------------------- planning

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
    small = saving < save_fraction
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


def compute_optimal_depth(model: str, params: np.ndarray, cost: tuple[float, float],
                          k_max: int = _K_MAX) -> np.ndarray:
    """Depth minimising T(K) * (u + v K) over 1..k_max, per parameter row.

    NaN where the minimum is at `k_max` (deeper keeps paying within the law).
    """
    ks = np.arange(1, k_max + 1)
    total = log_t_curve(model, params, ks) + np.log(cost[0] + cost[1] * ks)[None]
    j = np.argmin(total, axis=1)
    return np.where(j < k_max - 1, ks[j], np.nan).astype(float)


# ---------------------------------------------------------------- per-depth table

def summarize_depths(runs: Sequence[RunResult]) -> list[dict[str, Any]]:
    """One row per depth: counts by status, median and quartiles of T.

    Quantiles are taken over converged and censored runs with censored ones
    ranked last: the median is given only where under half the runs are
    censored, the quartiles only where under a quarter are; otherwise they are
    None and `median_note` says "more than the budget". Diverged runs are
    counted but have no T.
    """
    rows = []
    for k in sorted({r.depth for r in runs}):
        at = [r for r in runs if r.depth == k]
        finished = [r for r in at if r.status in ("converged", "censored")]
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
        budgets = [r.iterations for r in finished if r.status == "censored"]
        sec = [r.seconds_per_update for r in at
               if isinstance(r.seconds_per_update, (int, float)) and r.seconds_per_update > 0]
        rows.append({
            "depth": int(k), "runs": len(at),
            "converged": sum(r.status == "converged" for r in at), "censored": n_cens,
            "diverged": sum(r.status == "diverged" for r in at),
            "median": median, "q25": q25, "q75": q75,
            "median_note": "" if median is not None else (
                "more than the budget" if n else "no finished run"),
            "quartile_note": "" if q75 is not None else (
                "more than the budget" if n else "no finished run"),
            "budget": float(min(budgets)) if budgets else None,
            "seconds_per_update": float(np.median(sec)) if sec else None,
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


def _ci(values: np.ndarray, level: float = 0.95) -> list[float] | None:
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if len(v) < 10:
        return None
    lo, hi = np.quantile(v, [(1 - level) / 2, (1 + level) / 2])
    return [float(lo), float(hi)]


def _alpha(s: float | None) -> float | None:
    return None if s is None or not s < 1 else 1.0 / (1.0 - s)


# ---------------------------------------------------------------- one group of runs

@dataclass
class _Arrays:
    K: np.ndarray
    T: np.ndarray
    C: np.ndarray

    @property
    def x(self) -> np.ndarray:
        return np.log(self.K)

    @property
    def y(self) -> np.ndarray:
        return np.log(self.T)

    def subset(self, mask: np.ndarray) -> "_Arrays":
        return _Arrays(self.K[mask], self.T[mask], self.C[mask])


def _power_law_block(d: _Arrays, n_boot: int, seed: int) -> tuple[dict[str, Any], np.ndarray]:
    """The power law over the runs in `d`, with bootstrap; returns (fields, (B, 2) draws)."""
    pl = fit_power_law(d.K, d.T, d.C)
    rng = np.random.default_rng(seed)
    fitted = pl.intercept + pl.slope * d.x
    xb, Yb, Cb, method = _draws(d.x, d.y, d.C, n_boot, rng, fitted, 2)
    res = _tobit_batch(_design_power(xb), Yb, Cb, max_iter=60)
    draws = np.where(res["converged"][:, None], res["beta"], np.nan)
    t = stats.t.ppf(0.975, max(pl.n - 2, 1))
    boot_ci = _ci(draws[:, 1])
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
    block["alpha"] = _alpha(block["slope"]) if gain else None
    block["alpha_ci"] = [_alpha(block["slope_ci"][0]), _alpha(block["slope_ci"][1])] if gain else None
    return block


def _location(d: _Arrays, depths: list[int]) -> np.ndarray:
    """Per-depth median log T, censored runs ranked last (inf where unknown)."""
    out = []
    for k in depths:
        m = d.K == k
        v = np.sort(np.where(d.C[m], np.inf, d.y[m]))
        out.append(v[(len(v) - 1) // 2] if len(v) else np.inf)
    return np.array(out)


def _reversal_block(d: _Arrays, depths: list[int], n_boot: int,
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
    r_ci = _ci(beta_b[:, 1] + beta_b[:, 2])
    out.update(bic_segmented=bic(seg.loglik, 5, len(d.K)), falling_slope=seg.falling_slope,
               rising_slope=seg.rising_slope, rising_slope_ci=r_ci, n_depths_past=n_past,
               breakpoint=seg.breakpoint, breakpoint_ci=_ci(np.exp(psi_b)),
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


def _planning_block(model: str, point: np.ndarray, draws: np.ndarray, depths: list[int],
                    per_depth: list[dict[str, Any]], save_fraction: float, gain: bool,
                    rise_after: int | None = None) -> dict[str, Any]:
    """Planning figures; `rise_after` caps the recommendation where T turns up unconfirmed."""
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
    sec = [(r["depth"], r["seconds_per_update"]) for r in per_depth
           if r["seconds_per_update"] is not None]
    cost = fit_cost_model([k for k, _ in sec], [v for _, v in sec]) if sec else None
    if cost is None:
        optimal = {"depth": None, "ci": None, "extrapolated": False, "cost_model": None,
                   "note": "seconds per update measured at fewer than two depths"}
    else:
        optimal = figure(compute_optimal_depth(model, point[None], cost)[0],
                         compute_optimal_depth(model, draws[ok], cost))
        optimal["cost_model"] = {"seconds_intercept": cost[0], "seconds_per_layer": cost[1]}
        optimal["note"] = "" if optimal["depth"] is not None else (
            f"under the fitted law, T times seconds per update keeps falling up to "
            f"{_K_MAX} layers")
    if not gain:
        worth = {"depth": lo, "ci": None, "extrapolated": False}
        optimal.update(depth=None, ci=None, extrapolated=False,
                       note="depth gives no gain in these runs")
        rec, basis = lo, "shallowest swept depth, as depth gives no gain here"
    else:
        options = [(worth["depth"], f"last depth worth adding (next layer saves under "
                                    f"{100 * save_fraction:g} %)"),
                   (optimal["depth"], "compute-optimal depth (measured seconds per update)")]
        options = [(k, b) for k, b in options if k is not None]
        rec, basis = min(options) if options else (None, "no figure could be computed")
        if rise_after is not None and (rec is None or rec > rise_after):
            rec, basis = rise_after, (f"depth of the lowest measured T: T turns up past it, "
                                      f"and the fitted law alone would say {rec or 'deeper'}")
    return {"save_fraction": save_fraction, "model": model,
            "last_depth_worth_adding": worth, "compute_optimal_depth": optimal,
            "recommended_depth": rec, "recommended_basis": basis,
            "recommended_extrapolated": rec is not None and not lo <= rec <= hi}


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


def _fit_group(runs: list[RunResult], *, save_fraction: float, n_boot: int, seed: int,
               eval_every: int | None, source: str) -> dict[str, Any]:
    """The full fit of one learning-rate group (everything but the rate comparison)."""
    name = source or "the runs"
    per_depth = summarize_depths(runs)
    swept = [row["depth"] for row in per_depth]
    if len(swept) < 3:
        raise DataError(f"{name}: runs at {len(swept)} depth{'s' * (len(swept) != 1)} "
                        f"({', '.join(map(str, swept))}); a depth law needs at least three")
    used = [r for r in runs if r.status in ("converged", "censored")]
    d = _Arrays(np.array([r.depth for r in used], float),
                np.array([r.iterations for r in used], float),
                np.array([r.status == "censored" for r in used], bool))
    depths = sorted({int(k) for k in d.K})
    if len(depths) < 3:
        raise DataError(f"{name}: only {len(depths)} depths have runs that did not diverge; "
                        "a depth law needs at least three (lower the learning rate)")
    if len({r.depth for r in used if r.status == "converged"}) < 2:
        raise DataError(f"{name}: runs converged at fewer than two depths; raise the budget "
                        "(max_updates) so that the fit has values, not only lower bounds")
    rev, seg_draws = _reversal_block(d, depths, n_boot, seed)
    if rev["candidate"]:
        span = [k for k in depths if k <= rev["breakpoint"]]
    else:
        loc = _location(d, depths)
        span = [k for k in depths if k <= depths[int(np.argmin(loc))]]
        span = span if len(span) >= 3 else depths
    pl, pl_draws = _power_law_block(d.subset(d.K <= span[-1]), n_boot, seed + 2)
    pl = _with_alpha(pl)
    if len(span) >= 3:
        pl["without_shallowest"], _ = _power_law_block(
            d.subset((d.K > span[0]) & (d.K <= span[-1])), n_boot, seed + 3)
        _with_alpha(pl["without_shallowest"])
    else:
        pl["without_shallowest"] = None
    gain = _gain(pl)
    status = "none" if not gain else "observed" if rev["candidate"] else "beyond_range"
    reversal = _reversal_fields(rev, status, d, depths, seg_draws)
    if status == "observed":
        model, point, draws = "segmented", np.array(rev["point"]), seg_draws
        k_lo, k_hi = depths[0], depths[-1]
    else:
        model, point = "power_law", np.array([pl["intercept"], pl["slope"]])
        draws, k_lo, k_hi = pl_draws, span[0], span[-1]
    rise_after = span[-1] if reversal["rise_suspected"] else None
    planning = _planning_block(model, point, draws, depths, per_depth, save_fraction, gain,
                               rise_after)
    diffusion = diffusion_summary(runs)
    if diffusion is not None:
        diffusion["alpha"] = pl["alpha"]
    fit = {"depth_gain": gain, "depths_swept": depths, "n_runs": len(runs),
           "per_depth": per_depth, "power_law": pl, "reversal": reversal,
           "planning": planning, "diffusion": diffusion,
           "curve": _curve_block(model, point, draws, k_lo, k_hi),
           "eval_every": eval_every,
           "bootstrap": {"n_boot": n_boot, "seed": seed, "method": pl["ci_method"],
                         "n_failed": pl["n_boot_failed"]}}
    fit["warnings"] = _group_warnings(fit, d, eval_every)
    return fit


def _reversal_fields(rev: dict[str, Any], status: str, d: _Arrays, depths: list[int],
                     seg_draws: np.ndarray | None) -> dict[str, Any]:
    out = {key: rev.get(key) for key in ("falling_slope", "rising_slope", "rising_slope_ci",
                                         "bic_single", "bic_segmented", "n_depths_past")}
    out.update(status=status, depth=None, depth_ci=None, smooth_depth=None, smooth_model=None,
               rise_suspected=False)
    loc = _location(d, depths)
    k_min = depths[int(np.argmin(loc))]
    if status == "observed":
        out.update(depth=rev["breakpoint"], depth_ci=rev["breakpoint_ci"],
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


def _group_warnings(fit: dict[str, Any], d: _Arrays, eval_every: int | None) -> list[str]:
    out: list[str] = []
    depths, rows = fit["depths_swept"], fit["per_depth"]
    pl, rev, plan = fit["power_law"], fit["reversal"], fit["planning"]
    if len(depths) < 5:
        out.append(f"only {len(depths)} depths swept; a depth law wants five or more")
    if len(pl["depths_used"]) < 3:
        out.append(f"the slope rests on {len(pl['depths_used'])} depths only")
    fewest = min(r["converged"] + r["censored"] for r in rows)
    if fewest < 3:
        out.append(f"as few as {_plural(fewest, 'finished run')} at a depth: intervals "
                   "are rough; use three seeds or more per depth")
    if pl["ci_method"] == "residuals":
        out.append("some depths have a single run: intervals resample residuals, not seeds")
    heavy = [r["depth"] for r in rows if r["censored"] and 2 * r["censored"] >= r["converged"]
             + r["censored"]]
    if heavy:
        out.append(f"heavy censoring at depth {', '.join(map(str, heavy))}: half or more of the "
                   "runs hit the budget; they count as lower bounds, but raise max_updates")
    elif d.C.mean() > 0.25:
        out.append(f"{100 * d.C.mean():.0f} % of the runs hit the budget; raise max_updates")
    n_div = sum(r["diverged"] for r in rows)
    if n_div:
        out.append(f"{_plural(n_div, 'run')} diverged and {'are' if n_div > 1 else 'is'} "
                   "left out of the fit; lower the learning rate")
    if rev["status"] == "observed":
        ci = rev["depth_ci"] or [depths[0], depths[-1]]
        if rev["n_depths_past"] <= 2 or ci[0] < depths[1] or ci[1] > depths[-2]:
            out.append(f"the reversal at K = {rev['depth']:.1f} sits at the edge of the swept "
                       "depths; sweep a few layers deeper to confirm it")
        if rev["smooth_depth"] is None:
            out.append("the smooth two-term model did not fit; the reversal depth is not "
                       "cross-checked")
        elif abs(rev["smooth_depth"] - rev["depth"]) > 1:
            out.append(f"the segmented fit (K = {rev['depth']:.1f}) and the smooth two-term model "
                       f"(K = {rev['smooth_depth']:.1f}) disagree by more than one layer")
    if rev["rise_suspected"]:
        out.append(f"a rise past K = {fit['power_law']['depths_used'][-1]} is hinted but not "
                   "established; sweep deeper and add seeds before trusting a reversal")
    finished = [(r["median"], r["depth"]) for r in rows if r["median"] is not None]
    if eval_every and finished:
        t_low, k_low = min(finished)
        if eval_every > t_low / 20:
            out.append(f"evaluation every {eval_every} updates is coarse against T = {t_low:g} at "
                       f"depth {k_low} (more than T/20); evaluate more often")
    for key, label in (("last_depth_worth_adding", "last depth worth adding"),
                       ("compute_optimal_depth", "compute-optimal depth")):
        fig = plan[key]
        if fig["depth"] is not None and fig["extrapolated"]:
            out.append(f"the {label} ({fig['depth']}) lies outside the swept depths "
                       f"{depths[0]}-{depths[-1]}: it is extrapolated from the fitted law")
    without = pl.get("without_shallowest")
    if without and pl["slope"] < without["slope_ci"][0]:
        out.append(f"the shallowest depth steepens the slope ({pl['slope']:.2f} with it, "
                   f"{without['slope']:.2f} without); it may be capacity-limited")
    if not pl["converged"]:
        out.append("the censored power-law fit did not converge; raise max_updates")
    if pl["n_boot_failed"] > 0.05 * fit["bootstrap"]["n_boot"]:
        out.append(f"{pl['n_boot_failed']} bootstrap resamples failed to fit")
    return out


# ---------------------------------------------------------------- all runs

def _rate_key(r: RunResult) -> tuple[str, float | None]:
    if r.lr_mode == "tuned":
        return ("tuned", None)
    lr = r.learning_rate
    return ("fixed", float(lr) if isinstance(lr, (int, float)) and math.isfinite(lr) else None)


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
    message += (". A fixed-rate slope partly measures the rate; plan with the slope of the "
                "rate policy the big run will use")
    return {"primary": {"lr_mode": primary[0], "learning_rate": primary[1]},
            "slopes": slopes, "lr_exponent": lr_exponent, "message": message}


def fit_runs(runs: list[RunResult], *, save_fraction: float = 0.05, n_boot: int = 400,
             seed: int = 0, eval_every: int | None = None, source: str = "") -> dict[str, Any]:
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

    Returns:
        The content of fit.json (schema in the module docstring and
        docs/fit-json.md), JSON-ready, with no NaN. With several learning-rate
        groups the top level describes the primary group (the fixed-rate group
        with most runs, else the tuned group) and `by_learning_rate` holds a
        full fit per group.

    Raises:
        DataError: fewer than three depths, no converged runs at two depths, or
            no runs at all. ConfigError: save_fraction or n_boot out of range.
    """
    from .errors import ConfigError
    if not 0 < save_fraction < 1:
        raise ConfigError(f"save_fraction: must be between 0 and 1; got {save_fraction}")
    if n_boot < 20:
        raise ConfigError(f"n_boot: must be an int >= 20; got {n_boot}")
    # trials of a learning-rate search measure the search, not the depth law
    known = [r for r in runs if r.status in STATUSES and r.lr_mode != "tuning"]
    if not known:
        raise DataError(f"{source or 'input'}: no finished runs to fit")
    if eval_every is None:
        eval_every = eval_interval(known)
    groups: dict[tuple[str, float | None], list[RunResult]] = {}
    for r in known:
        groups.setdefault(_rate_key(r), []).append(r)
    keys = sorted(groups, key=lambda k: (k[0] == "tuned", k[1] if k[1] is not None else -1.0))
    fixed = [k for k in keys if k[0] == "fixed"]
    primary = max(fixed, key=lambda k: len(groups[k])) if fixed else keys[0]
    kw = dict(save_fraction=save_fraction, n_boot=n_boot, seed=seed, eval_every=eval_every)
    main = {"group": _group_label(primary, groups[primary]),
            **_fit_group(groups[primary], source=source, **kw)}
    by_rate, interaction = [], None
    if len(groups) > 1:
        for key in keys:
            label = _group_label(key, groups[key])
            if key == primary:
                by_rate.append(main)
                continue
            try:
                by_rate.append({"group": label, **_fit_group(
                    groups[key], source=f"{source or 'input'} ({_describe(label)})", **kw)})
            except DataError as exc:
                by_rate.append({"group": label, "skipped": str(exc)})
        interaction = _lr_interaction(by_rate, groups, primary)
    notes = list(main["warnings"])
    if len(known) < len(runs):
        notes.insert(0, f"{_plural(len(runs) - len(known), 'run')} failed, unfinished or from "
                        "a learning-rate search left out")
    if interaction:
        notes.append(interaction["message"])
    result = {"schema": SCHEMA, "source": source, **main, "by_learning_rate": by_rate,
              "lr_interaction": interaction, "warnings": notes}
    return _clean(result)


def _plural(n: int, noun: str) -> str:
    return f"{n} {noun}{'s' * (n != 1)}"


def _describe(group: dict[str, Any]) -> str:
    if group["lr_mode"] == "tuned":
        return "learning rate tuned per depth"
    if group["learning_rate"] is None:
        return "learning rate not recorded"
    return f"fixed learning rate {group['learning_rate']:g}"


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


def fit_path(path: Path, json_out: Path | None = None, **kw: Any) -> tuple[dict[str, Any], Path]:
    """Load a results folder or measurements table, fit it, and write fit.json.

    Args:
        path: results folder or CSV table (see `depthplan.tables.load_runs`).
        json_out: where to write; default `default_json_path(path)`.
        **kw: passed to `fit_runs` (save_fraction, n_boot, seed, eval_every).

    Returns:
        (the fit, the path written). The file is replaced atomically.

    Raises:
        DataError: unreadable input, too few depths, or no folder for json_out.
    """
    path = Path(path)
    runs = load_runs(path)
    info = read_sweep_info(path) if path.is_dir() else {}
    kw.setdefault("eval_every", eval_interval(runs, info))
    kw.setdefault("source", str(path))
    fit = fit_runs(runs, **kw)
    fit["input"] = _clean({"kind": "results_folder" if path.is_dir() else "table",
                           "sweep_name": info.get("name"), "max_updates": info.get("max_updates")})
    out = Path(json_out) if json_out is not None else default_json_path(path)
    if not out.parent.is_dir():
        raise DataError(f"{out}: the folder {out.parent} does not exist")
    tmp = out.with_name(out.name + ".tmp")
    tmp.write_text(json.dumps(fit, indent=2, allow_nan=False) + "\n", encoding="utf-8")
    tmp.replace(out)
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


# ---------------------------------------------------------------- summary text

def _ci_text(ci: Sequence[float] | None, fmt: str = ".2f") -> str:
    return "" if not ci or None in ci else f" (95 % interval {ci[0]:{fmt}} to {ci[1]:{fmt}})"


def format_summary(fit: dict[str, Any]) -> str:
    """The short plain-text summary `depthplan fit` prints."""
    pl, rev, plan = fit["power_law"], fit["reversal"], fit["planning"]
    depths = fit["depths_swept"]
    lines = [f"Fitted {fit['n_runs']} runs at depths {depths[0]}-{depths[-1]}"
             f" ({_describe(fit['group'])})"
             + (f" from {fit['source']}" if fit.get("source") else "") + "."]
    rec = plan["recommended_depth"]
    if rec is not None:
        lines.append(f"Recommended depth: {_plural(rec, 'layer')}"
                     + (" [extrapolated]" if plan["recommended_extrapolated"] else "")
                     + f" (from the {plan['recommended_basis']}).")
    used = pl["depths_used"]
    lines.append(f"Depth law T ~ K^s over depths {used[0]}-{used[-1]}: s = {pl['slope']:.2f} "
                 f"+/- {pl['slope_se']:.2f}{_ci_text(pl['slope_ci'])}, R^2 = {pl['r2']:.2f}"
                 + (f", {pl['n_censored']} censored (used as lower bounds)"
                    if pl["n_censored"] else "") + ".")
    without = pl.get("without_shallowest")
    if without:
        lines.append(f"Without the shallowest depth: s = {without['slope']:.2f}"
                     f"{_ci_text(without['slope_ci'])}.")
    if fit["depth_gain"]:
        lines.append(f"Alpha = 1/(1 - s) = {pl['alpha']:.2f}{_ci_text(pl['alpha_ci'])}.")
    else:
        lines.append("Depth gives no gain here (s >= 0 or its interval includes 0); "
                     "no alpha is reported.")
    if rev["status"] == "observed":
        lines.append(f"Reversal observed at K = {rev['depth']:.1f}{_ci_text(rev['depth_ci'], '.1f')}"
                     f"; rising slope {rev['rising_slope']:.2f}"
                     + (f"; smooth model minimum at K = {rev['smooth_depth']:.1f}"
                        if rev["smooth_depth"] is not None else "") + ".")
    else:
        lines.append(f"Reversal: {rev['status'].replace('_', ' ')}: {rev['note']}.")
    worth, opt = plan["last_depth_worth_adding"], plan["compute_optimal_depth"]
    if worth["depth"] is not None:
        lines.append(f"Last depth worth adding (next layer saves under "
                     f"{100 * plan['save_fraction']:g} %): {worth['depth']}"
                     f"{_ci_text(worth['ci'], '.0f')}"
                     + (" [extrapolated]" if worth["extrapolated"] else "") + ".")
    if opt["depth"] is not None:
        lines.append(f"Compute-optimal depth (measured seconds per update): {opt['depth']}"
                     f"{_ci_text(opt['ci'], '.0f')}"
                     + (" [extrapolated]" if opt["extrapolated"] else "") + ".")
    elif opt.get("note"):
        lines.append(f"Compute-optimal depth: not given ({opt['note']}).")
    diff = fit.get("diffusion")
    if diff and diff.get("late_exponent_median") is not None:
        alpha = (f"against alpha {diff['alpha']:.2f} from the depth law"
                 if diff.get("alpha") is not None else "(no alpha from the depth law to compare)")
        text = (f"Probes: late-phase displacement exponent {diff['late_exponent_median']:.2f} "
                f"{alpha}")
        if diff.get("snr_drop_db_median") is not None:
            text += f"; gradient SNR falls {diff['snr_drop_db_median']:.0f} dB"
        if diff.get("transition_step_median") is not None:
            text += f" around step {diff['transition_step_median']:.0f}"
        lines.append(text + ".")
    if fit.get("lr_interaction"):
        lines.append(f"Several learning-rate groups: the figures above are for the "
                     f"{_describe(fit['group'])}; each group is fitted in by_learning_rate.")
    if fit["warnings"]:
        lines.append("Warnings:")
        lines.extend(f"  - {w}" for w in fit["warnings"])
    lines.append("These figures come from small proxy networks; the depth law of the big run "
                 "may differ, so check a depth or two at full scale before committing.")
    return "\n".join(lines)
