"""The estimators of the depth law, on plain arrays (numpy/scipy, no torch).

`fit_power_law` fits T = c * K**s on log-log axes (Tobit on log T, ordinary
least squares when nothing is censored), `fit_segmented` the continuous
broken stick of log T on log K (Muggeo 2003), `fit_two_term` the smooth
T = A K**s + B K**r, and `bic` compares them. Right-censored runs (those that
hit their budget) enter every likelihood as lower bounds through
`_tobit_batch`, which fits many problems sharing one design at once, so that
the bootstrap in `depthplan.depthlaw` refits all its resamples in one call.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import optimize, special

from ..errors import ConvergenceWarning

_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
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


# ---------------------------------------------------------------- sums of two powers, batched

def _powers_loglik(theta: np.ndarray, x: np.ndarray, Y: np.ndarray, C: np.ndarray,
                   saturating: bool) -> tuple[np.ndarray, np.ndarray]:
    """Tobit log-likelihood (B,) and gradient (B, p) of log T = log(A K^s + B K^r) per row.

    theta (B, p): two-term (log A, log B, u, v, log sigma) with s = -exp(u), r = exp(v);
    saturating (log A, log T_inf, u, log sigma), the same with r = 0 (T_inf = B).
    x (n,), Y and C (B, n).
    """
    la, lb, u = theta[:, 0:1], theta[:, 1:2], theta[:, 2:3]
    ls = theta[:, -1:]
    s = -np.exp(u)
    r = np.zeros_like(s) if saturating else np.exp(theta[:, 3:4])
    t1, t2 = la + s * x, lb + r * x
    mu = np.logaddexp(t1, t2)
    w1 = np.exp(t1 - mu)
    w2 = 1.0 - w1
    sigma = np.exp(ls)
    z = (Y - mu) / sigma
    log_sf = special.log_ndtr(-z)
    lam = np.exp(-0.5 * z ** 2 - _LOG_SQRT_2PI - log_sf)
    ll = np.where(C, log_sf, -ls - _LOG_SQRT_2PI - 0.5 * z ** 2).sum(1)
    dmu = np.where(C, lam, z) / sigma
    dls = np.where(C, lam * z, z ** 2 - 1.0)
    cols = [(dmu * w1).sum(1), (dmu * w2).sum(1), (dmu * w1 * x).sum(1) * s[:, 0]]
    if not saturating:
        cols.append((dmu * w2 * x).sum(1) * r[:, 0])
    cols.append(dls.sum(1))
    return ll, np.column_stack(cols)


def _fit_powers_batch(x: np.ndarray, Y: np.ndarray, C: np.ndarray, theta0: np.ndarray, *,
                      saturating: bool, max_iter: int = 60) -> tuple[np.ndarray, np.ndarray]:
    """Maximise `_powers_loglik` row by row from `theta0`, all rows at once.

    Levenberg-Marquardt steps on the Hessian taken by central differences of the
    exact gradient, each step kept only if the likelihood rises. Exponents stay
    in [exp(-6), exp(2.5)], log sigma in [-12, 3], log A and log B no lower than
    min(log T) - 25 (a term that small is absent). Returns (theta (B, p), loglik (B,)).
    """
    Y = np.atleast_2d(np.asarray(Y, float))
    C = np.broadcast_to(np.asarray(C, bool), Y.shape)
    theta = np.array(theta0, float, copy=True)
    B, p = theta.shape
    floor = float(Y.min()) - 25.0
    lo = np.array([floor, floor, -6.0] + ([] if saturating else [-6.0]) + [-12.0])
    hi = np.array([np.inf, np.inf, 2.5] + ([] if saturating else [2.5]) + [3.0])
    theta = np.clip(theta, lo, hi)
    ll, g = _powers_loglik(theta, x, Y, C, saturating)
    damp = np.full(B, 1e-3)
    active = np.isfinite(ll)
    h = 1e-5
    eye = np.eye(p)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if not len(idx):
            break
        th, Yi, Ci = theta[idx], Y[idx], C[idx]
        H = np.empty((len(idx), p, p))
        for j in range(p):
            e = h * eye[j]
            H[:, :, j] = (_powers_loglik(th + e, x, Yi, Ci, saturating)[1]
                          - _powers_loglik(th - e, x, Yi, Ci, saturating)[1]) / (2 * h)
        H = 0.5 * (H + H.transpose(0, 2, 1))
        scale = np.abs(np.diagonal(H, axis1=1, axis2=2)) + 1e-8
        A = -H + damp[idx, None, None] * scale[:, None, :] * eye[None]
        try:
            step = np.linalg.solve(A, g[idx][..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = g[idx] / scale
        trial = np.clip(th + step, lo, hi)
        new_ll, new_g = _powers_loglik(trial, x, Yi, Ci, saturating)
        better = np.isfinite(new_ll) & (new_ll > ll[idx])
        gain = np.where(better, new_ll - ll[idx], 0.0)
        ok, bad = idx[better], idx[~better]
        theta[ok], ll[ok], g[ok] = trial[better], new_ll[better], new_g[better]
        damp[ok] = np.maximum(damp[ok] / 3.0, 1e-9)
        damp[bad] *= 10.0
        done = (better & (gain < 1e-8)) | (damp[idx] > 1e6)
        active[idx[done]] = False
    return theta, ll


def _powers_starts(x: np.ndarray, y: np.ndarray, saturating: bool) -> np.ndarray:
    """Start rows for `_fit_powers_batch`: a spread of exponents, terms split at mid-depth."""
    xm, ym = float(np.median(x)), float(np.median(y))
    sd = math.log(max(float(np.std(y)), 0.05))
    rows = []
    if saturating:
        y_deep = float(np.min(y))
        for s0 in (-0.4, -1.0, -2.5):
            for share in (0.2, 0.7):             # T_inf as a share of T at the deepest depth
                rows.append([float(np.max(y)) + math.log(1 - share * 0.99) - s0 * float(np.min(x)),
                             y_deep + math.log(share), math.log(-s0), sd])
    else:
        for s0, r0 in ((-1.0, 1.0), (-0.5, 2.0), (-2.0, 0.5), (-1.0, 0.3)):
            rows.append([ym - math.log(2) - s0 * xm, ym - math.log(2) - r0 * xm,
                         math.log(-s0), math.log(r0), sd])
    return np.array(rows)


@dataclass(frozen=True)
class SaturatingFit:
    """T = T_inf + A K**s with A, T_inf >= 0 and s < 0: T levels off at T_inf (a plateau)."""

    A: float
    s: float
    T_inf: float
    sigma: float
    loglik: float
    converged: bool


def fit_saturating(depths: Sequence[float], iterations: Sequence[float],
                   censored: Sequence[bool] | None = None) -> SaturatingFit:
    """Fit the saturating law T = T_inf + A K**s by maximum likelihood on log T.

    Censored runs enter as lower bounds (Tobit), as in `fit_power_law`. The best
    of several starts is kept; T_inf near 0 means no plateau (the single law).
    """
    x, y, c = _prepare(depths, iterations, censored)
    starts = _powers_starts(x, y, True)
    theta, ll = _fit_powers_batch(x, np.tile(y, (len(starts), 1)), np.tile(c, (len(starts), 1)),
                                  starts, saturating=True)
    j = int(np.nanargmax(np.where(np.isfinite(ll), ll, -np.inf)))
    la, lt, u, ls = theta[j]
    return SaturatingFit(A=math.exp(la), s=-math.exp(u), T_inf=math.exp(lt),
                         sigma=math.exp(ls), loglik=float(ll[j]), converged=bool(np.isfinite(ll[j])))


def aicc(loglik: float | np.ndarray, n_params: int, n: int) -> float | np.ndarray:
    """Small-sample Akaike criterion -2 log L + 2k + 2k(k+1)/(n-k-1) (Hurvich and Tsai 1989;
    Burnham and Anderson 2002, sec. 2.4): lower is better; inf when n <= k + 1."""
    if n - n_params - 1 <= 0:
        return np.inf * np.ones_like(loglik) if isinstance(loglik, np.ndarray) else math.inf
    return -2.0 * loglik + 2 * n_params + 2 * n_params * (n_params + 1) / (n - n_params - 1)
