"""Several depth-law models, one answer: fits, AICc weights, reselecting bootstrap, lack of fit.

Four models of log T against x = log K are fitted to the same runs, censored
runs as lower bounds (Tobit) in every likelihood:

    power_law    T = c K^s                        3 parameters with sigma
    saturating   T = T_inf + A K^s  (a plateau)   4
    segmented    broken stick, Muggeo 2003        5
    two_term     T = A K^s + B K^r                5

They are compared by AICc, the small-sample Akaike criterion, and weighted by
Akaike weights w_i = exp(-D_i / 2) / sum_j exp(-D_j / 2), D_i the AICc minus
the smallest one (Burnham and Anderson 2002, Model Selection and Multimodel
Inference, sec. 2.4 and 2.9). The model with the lowest AICc gives the answer.

Model uncertainty enters the intervals by reselection: every bootstrap
replicate (seeds resampled within depths, Efron and Tibshirani 1993) refits
all the models and keeps the one its own AICc prefers, so a figure's interval
spans the models the data cannot tell apart, not only the seed noise of one.
All four bend the same way or not at all: the saturating and two-term models
only flatten (or turn up) with depth, and a broken stick that steepens past
its break is no candidate (in the point fit or in a replicate), since it is
neither a plateau nor a reversal and would only chase seed noise. Each
replicate's parameters are stored as a coded row (`code`, p0..p3) that
`depthplan.fitting.planning.log_t_curve("selected", ...)` evaluates.

The lack-of-fit check compares the model with each depth's centre of log T
(the mean where nothing is censored, else the median) in units of that
centre's standard error from the pooled within-depth spread (pure error,
Draper and Smith 1998, Applied Regression Analysis, sec. 2.1). A model fails
when the sum of squared z exceeds the 99th percentile of chi-square with
(depths - mean parameters) degrees of freedom; the depths with |z| > 2 are
named.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
from scipy import stats

from .depthlaw import RunArrays, _draws
from .estimators import (
    _breakpoint_grid,
    _design_power,
    _fit_powers_batch,
    _powers_starts,
    _segmented_profile,
    _tobit_batch,
    aicc,
    fit_power_law,
    fit_segmented,
)
from .planning import MODELS, log_t_curve

CODES = {name: i for i, name in enumerate(MODELS)}
N_PARAMS = {"power_law": 3, "saturating": 4, "segmented": 5, "two_term": 5}   # sigma included
LACK_OF_FIT_P = 0.01      # a model fails the lack-of-fit check below this p-value
MISSED_Z = 2.0            # a depth is named as missed beyond this many standard errors
_MEDIAN_SE = math.sqrt(math.pi / 2)   # se of a normal median over se of the mean


@dataclass
class Candidate:
    """One model's fit to the runs: its coded parameter row and likelihood."""

    name: str
    row: np.ndarray           # (5,) code, p0..p3
    loglik: float
    aicc: float
    start: np.ndarray         # parameters in the optimiser's own form (warm start)


def eligible_models(n_depths: int, rising: bool) -> list[str]:
    """Models that may answer: rising ones (two_term) only where a reversal is observed."""
    names = ["power_law", "saturating"]
    if n_depths >= 4:
        names.append("segmented")
        if rising:
            names.append("two_term")
    return names


def _row(name: str, p: Sequence[float]) -> np.ndarray:
    out = np.zeros(5)
    out[0] = CODES[name]
    out[1:1 + len(p)] = p
    return out


def _powers_rows(name: str, theta: np.ndarray) -> np.ndarray:
    """Coded rows from `_fit_powers_batch` parameters: (log A, s, log B, r)."""
    s = -np.exp(theta[:, 2])
    r = np.zeros(len(theta)) if name == "saturating" else np.exp(theta[:, 3])
    rows = np.zeros((len(theta), 5))
    rows[:, 0] = CODES[name]
    rows[:, 1], rows[:, 2], rows[:, 3], rows[:, 4] = theta[:, 0], s, theta[:, 1], r
    return rows


def fit_candidates(d: RunArrays, names: Sequence[str]) -> dict[str, Candidate]:
    """Point fits of the named models to the runs in `d` (same runs for each)."""
    n, x, y, c = len(d.K), d.x, d.y, d.C
    out: dict[str, Candidate] = {}
    for name in names:
        if name == "power_law":
            f = fit_power_law(d.K, d.T, d.C)
            row, ll, start = _row(name, [f.intercept, f.slope]), f.loglik, np.array([])
        elif name == "segmented":
            f = fit_segmented(d.K, d.T, d.C)
            if f.rising_slope < f.falling_slope:     # steepens past the break: not a candidate
                continue
            psi = math.log(f.breakpoint)
            row = _row(name, [f.intercept, f.falling_slope, f.rising_slope - f.falling_slope, psi])
            ll, start = f.loglik, np.array([])
        else:
            sat = name == "saturating"
            starts = _powers_starts(x, y, sat)
            theta, lls = _fit_powers_batch(x, np.tile(y, (len(starts), 1)),
                                           np.tile(c, (len(starts), 1)), starts, saturating=sat)
            lls = np.where(np.isfinite(lls), lls, -np.inf)
            j = int(np.argmax(lls))
            row, ll, start = _powers_rows(name, theta[j:j + 1])[0], float(lls[j]), theta[j]
        out[name] = Candidate(name, row, float(ll), float(aicc(ll, N_PARAMS[name], n)), start)
    return out


def akaike_weights(cands: dict[str, Candidate]) -> dict[str, float]:
    """Akaike weights of the candidates (Burnham and Anderson 2002, sec. 2.9)."""
    a = np.array([cd.aicc for cd in cands.values()])
    if not np.isfinite(a).any():
        return {k: 1.0 / len(cands) for k in cands}
    w = np.exp(-0.5 * (a - np.nanmin(a[np.isfinite(a)])))
    w = np.where(np.isfinite(w), w, 0.0)
    return {k: float(v) for k, v in zip(cands, w / w.sum())}


def k_star(rows: np.ndarray) -> np.ndarray:
    """Depth of minimum T of each coded row (NaN for models without an inner minimum)."""
    rows = np.atleast_2d(rows)
    code, p0, p1, p2, p3 = rows.T
    out = np.full(len(rows), np.nan)
    seg = (code == CODES["segmented"]) & (p1 < 0) & (p1 + p2 > 0)
    out[seg] = np.exp(p3[seg])
    tt = (code == CODES["two_term"]) & (p1 < 0) & (p3 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        v = (np.log(-p1) + p0 - np.log(p3) - p2) / (p3 - p1)
    out[tt] = np.exp(v[tt])
    return out


# ---------------------------------------------------------------- bootstrap with reselection

def refit_replicates(xb: np.ndarray, Yb: np.ndarray, Cb: np.ndarray,
                     cands: dict[str, Candidate]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Every candidate refitted to every replicate: name -> (coded rows (B, 5), loglik (B,))."""
    out = {}
    B = len(Yb)
    for name, cd in cands.items():
        if name == "power_law":
            res = _tobit_batch(_design_power(xb), Yb, Cb, max_iter=60)
            rows = np.zeros((B, 5))
            rows[:, 0], rows[:, 1:3] = CODES[name], res["beta"]
            ll = np.where(res["converged"], res["loglik"], -np.inf)
        elif name == "segmented":
            psi, beta, ll = _segmented_profile(xb, Yb, Cb, _breakpoint_grid(xb))
            rows = np.column_stack([np.full(B, CODES[name]), beta, psi])
            ll = np.where(beta[:, 2] >= 0, ll, -np.inf)      # steepening sticks are no candidate
        else:
            theta, ll = _fit_powers_batch(xb, Yb, Cb, np.tile(cd.start, (B, 1)),
                                          saturating=name == "saturating", max_iter=40)
            rows = _powers_rows(name, theta)
        out[name] = (rows, np.where(np.isfinite(ll), ll, -np.inf))
    return out


def reselect(refits: dict[str, tuple[np.ndarray, np.ndarray]], n: int,
             names: Sequence[str] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Per replicate, the AICc-preferred model among `names`: (coded rows (B, 5), names (B,))."""
    names = list(names or refits)
    scores = np.array([aicc(refits[k][1], N_PARAMS[k], n) for k in names])     # (M, B)
    j = np.argmin(np.where(np.isfinite(scores), scores, np.inf), axis=0)
    rows = np.stack([refits[k][0] for k in names])                              # (M, B, 5)
    return rows[j, np.arange(rows.shape[1])], np.array(names)[j]


def bootstrap_selection(d: RunArrays, cands: dict[str, Candidate], chosen: str, n_boot: int,
                        seed: int) -> dict[str, Any]:
    """Refit and reselect on `n_boot` replicates; the draws every interval is read from.

    Returns rows (B, 5) of the reselected models, `picked` (B,) their names,
    `k_star` (B,) the reversal depth of each replicate reselected among the models
    with an inner minimum (segmented, two_term), and `method` of the resampling.
    """
    fitted = log_t_curve("selected", cands[chosen].row[None], d.K)[0]
    xb, Yb, Cb, method = _draws(d.x, d.y, d.C, n_boot, np.random.default_rng(seed + 11),
                                fitted, N_PARAMS[chosen])
    refits = refit_replicates(xb, Yb, Cb, cands)
    rows, picked = reselect(refits, len(xb))
    rising = [k for k in ("segmented", "two_term") if k in refits]
    ks = k_star(reselect(refits, len(xb), rising)[0]) if rising else np.full(n_boot, np.nan)
    return {"rows": rows, "picked": picked, "k_star": ks, "method": method}


# ---------------------------------------------------------------- lack of fit

def lack_of_fit(d: RunArrays, row: np.ndarray, n_params: int) -> dict[str, Any]:
    """The model against each depth's centre of log T (see the module docstring)."""
    depths = sorted({float(k) for k in d.K})
    resid, n_pe = 0.0, 0
    centres = []
    for k in depths:
        m = d.K == k
        yk, ck = d.y[m], d.C[m]
        conv = yk[~ck]
        if len(conv) >= 2:
            resid += float(((conv - conv.mean()) ** 2).sum())
            n_pe += len(conv) - 1
        if ck.any():
            v = np.sort(np.where(ck, np.inf, yk))
            if 2 * ck.sum() >= len(yk):
                continue
            centres.append((k, float(np.median(v)), len(yk), _MEDIAN_SE))
        else:
            centres.append((k, float(yk.mean()), len(yk), 1.0))
    dof = len(centres) - (n_params - 1)
    if n_pe < 2 or dof < 1:
        return {"checked": False, "p_value": None, "missed_depths": [], "z": []}
    s_pe = max(math.sqrt(resid / n_pe), 0.01)
    fit = log_t_curve("selected", row[None], np.array([c[0] for c in centres]))[0]
    z = np.array([(c[1] - f) / (c[3] * s_pe / math.sqrt(c[2])) for c, f in zip(centres, fit)])
    p = float(stats.chi2.sf(float((z ** 2).sum()), dof))
    missed = [int(c[0]) for c, zi in zip(centres, z) if abs(zi) > MISSED_Z] if p < LACK_OF_FIT_P else []
    return {"checked": True, "p_value": p, "missed_depths": missed,
            "z": [{"depth": int(c[0]), "z": float(zi)} for c, zi in zip(centres, z)]}
