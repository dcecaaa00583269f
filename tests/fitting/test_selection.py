"""Tests of depthplan.fitting.selection: AICc weights, the saturating law, coverage of K*.

Every data set is invented (seeded synthetic runs from a known law). Sources: AICc and Akaike
weights, Burnham and Anderson (2002), Model Selection and Multimodel Inference, sec. 2.4 and
2.9 (AICc of Hurvich and Tsai 1989); percentile bootstrap, Efron and Tibshirani (1993), An
Introduction to the Bootstrap.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from depthplan import fitting as F
from depthplan.fitting import selection as S
from depthplan.fitting.depthlaw import RunArrays, percentile_ci

from fitting_data import arrays, power, synthetic_runs


def _gauss_loglik(rss: float, n: int) -> float:
    # maximised normal log-likelihood with sigma^2 = RSS / n (ordinary least squares)
    return -0.5 * n * (math.log(2 * math.pi * rss / n) + 1.0)


def _aicc(ll: float, k: int, n: int) -> float:
    # Burnham and Anderson (2002), eq. 2.14, written out here, not taken from the package
    return -2 * ll + 2 * k + 2 * k * (k + 1) / (n - k - 1)


def _by_hand(K: np.ndarray, T: np.ndarray) -> dict[str, float]:
    """AICc of each model, every likelihood from scipy on uncensored runs."""
    x, y, n = np.log(K), np.log(T), len(K)
    ref = stats.linregress(x, y)                        # reference library: scipy.stats.linregress
    out = {"power_law": _aicc(_gauss_loglik(float(((y - ref.intercept - ref.slope * x) ** 2).sum()),
                                            n), 3, n)}
    best = math.inf                                     # saturating: scipy least squares, many starts
    for s0 in (-0.3, -0.8, -1.5, -3.0):
        for share in (0.05, 0.3, 0.7):
            t_inf = share * T.min()
            a0 = (T.max() - t_inf) * K.min() ** -s0
            res = optimize.least_squares(
                lambda p: np.log(np.exp(p[0]) + np.exp(p[1]) * K ** p[2]) - y,
                [math.log(t_inf), math.log(a0), s0], bounds=([-30, -30, -20], [30, 40, 0]))
            best = min(best, float((res.fun ** 2).sum()))
    out["saturating"] = _aicc(_gauss_loglik(best, n), 4, n)
    xs = np.unique(x)                                   # broken stick: brute force over the break
    fits = []
    for psi in np.linspace(xs[1], xs[-2], 4001):
        X = np.column_stack([np.ones(n), x, np.clip(x - psi, 0, None)])
        beta, *_ = np.linalg.lstsq(X, y, rcond=None)
        fits.append((float(((y - X @ beta) ** 2).sum()), beta[2]))
    rss, d = min(fits)
    if d >= 0:                                          # a steepening stick is no candidate
        out["segmented"] = _aicc(_gauss_loglik(rss, n), 5, n)
    return out


def _weights(aiccs: dict[str, float]) -> dict[str, float]:
    low = min(aiccs.values())
    w = {k: math.exp(-0.5 * (v - low)) for k, v in aiccs.items()}
    return {k: v / sum(w.values()) for k, v in w.items()}


def plateau(t_inf: float, a: float, s: float):
    return lambda k: math.log(t_inf + a * k ** s)


@pytest.mark.parametrize("law, sigma, seed", [(plateau(2000, 30000, -1.2), 0.05, 0),
                                               (power(5000, -0.8), 0.1, 3)])
def test_akaike_weights_match_a_hand_computation(law, sigma, seed):
    rng = np.random.default_rng(seed)
    runs = synthetic_runs(law, [1, 2, 3, 4, 6, 8, 12, 16], 3, sigma, rng)
    fit = F.fit_runs(runs, n_boot=40)
    K, T, _ = arrays(runs)
    hand = _by_hand(K, T)
    cands = {c["model"]: c for c in fit["models"]["candidates"]}
    assert set(cands) == set(hand)
    for name, value in hand.items():
        assert cands[name]["aicc"] == pytest.approx(value, abs=2e-3)
    for name, w in _weights(hand).items():
        assert cands[name]["weight"] == pytest.approx(w, abs=2e-3)
    assert sum(c["weight"] for c in cands.values()) == pytest.approx(1.0)


def test_saturating_law_is_chosen_and_plans_at_the_plateau_onset():
    truth = plateau(2000, 30000, -1.2)
    ks = np.arange(1, 101)
    t = np.exp([truth(k) for k in ks])
    onset = int(ks[np.argmax(1 - t[1:] / t[:-1] < 0.05)])     # arithmetic on the known law: 11
    rng = np.random.default_rng(0)
    fit = F.fit_runs(synthetic_runs(truth, [1, 2, 3, 4, 6, 8, 12, 16, 24], 4, 0.05, rng),
                     n_boot=60)
    models = fit["models"]
    weights = {c["model"]: c["weight"] for c in models["candidates"]}
    assert models["chosen"] == "saturating" == max(weights, key=weights.get)
    assert weights["saturating"] > 0.9
    sat = next(c for c in models["candidates"] if c["model"] == "saturating")
    assert sat["params"]["T_inf"] == pytest.approx(2000, rel=0.15)
    assert sat["params"]["s"] == pytest.approx(-1.2, abs=0.2)
    assert not sat["lack_of_fit"]["missed_depths"]
    worth = fit["planning"]["last_depth_worth_adding"]
    assert abs(worth["depth"] - onset) <= 1
    assert worth["ci"][0] - 1 <= onset <= worth["ci"][1] + 1
    assert fit["planning"]["model"] == "saturating" and fit["curve"]["model"] == "saturating"
    # the single law over 1-24 misses the medians: the check names the depths and warns
    single = fit["power_law"]["lack_of_fit"]
    assert single["p_value"] < 0.01 and len(single["missed_depths"]) >= 3
    assert any(w.startswith("the single power law misses depths") for w in fit["warnings"])
    assert "saturating law (plateau) 1.00" in F.format_summary(fit)


def test_clean_power_law_keeps_the_single_law():
    # keep clean data as it was: the single law answers, and no lack-of-fit warning
    rng = np.random.default_rng(16)
    fit = F.fit_runs(synthetic_runs(power(5000, -1.0), range(1, 9), 4, 0.02, rng), n_boot=60)
    assert fit["models"]["chosen"] == "power_law"
    assert fit["planning"]["last_depth_worth_adding"]["depth"] == 20      # 1 - K/(K+1) < 5 %
    assert not any("misses" in w for w in fit["warnings"])


def test_reversal_depth_interval_covers_the_truth_with_model_choice_inside_the_bootstrap():
    """Coverage of the 95 % percentile interval of K* (Efron and Tibshirani 1993), each
    replicate refitting all models and reselecting by AICc (Burnham and Anderson 2002).

    Truth: the two-term law T = 4000/K + 40 K (minimum at K* = 10 exactly, closed form
    sqrt(4000/40)), 4 seeds at depths 2-32, log-normal scatter 0.1; 40 invented sweeps,
    30 resamples each. Measured coverage with these seeds: 0.875 (35 of 40), close to
    the nominal 0.95 for 40 repeats (its binomial standard error there is about 0.035).
    """
    rng = np.random.default_rng(1)
    depths = [2, 3, 4, 6, 8, 11, 16, 22, 32]
    hits, reps = 0, 40
    for i in range(reps):
        K, T, C = arrays(synthetic_runs(lambda k: math.log(4000 / k + 40 * k), depths, 4, 0.1,
                                        rng))
        d = RunArrays(K, T, C)
        cands = S.fit_candidates(d, S.eligible_models(len(depths), rising=True))
        chosen = min(cands, key=lambda k: cands[k].aicc)
        boot = S.bootstrap_selection(d, cands, chosen, 30, seed=i)
        ci = percentile_ci(boot["k_star"])
        hits += ci is not None and ci[0] <= 10.0 <= ci[1]
    assert hits / reps >= 0.8
