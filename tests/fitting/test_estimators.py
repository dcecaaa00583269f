"""Tobit power law, broken stick and two-term estimators (depthplan.fitting.estimators) and the slope's bootstrap interval.

Every data set here is invented (seeded synthetic runs drawn from a known law), and named as
such; sources of the reference values are given beside each check.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, stats

from depthplan import fitting as F
from depthplan.fitting import depthlaw
from depthplan.errors import ConvergenceWarning

from fitting_data import arrays, broken, power, synthetic_runs


def _coverage(reps: int, budget: float, n_boot: int, seed: int) -> tuple[float, float]:
    rng = np.random.default_rng(seed)
    hits_boot = hits_t = 0
    for i in range(reps):
        runs = synthetic_runs(power(8000, -1.0), [1, 2, 3, 4, 6, 8], 8, 0.3, rng, budget=budget)
        d = depthlaw.RunArrays(*arrays(runs))
        block, _ = depthlaw.power_law_block(d, n_boot, seed=i)
        lo, hi = block["slope_ci"]
        hits_boot += lo <= -1.0 <= hi
        lo, hi = block["slope_ci_analytic"]
        hits_t += lo <= -1.0 <= hi
    return hits_boot / reps, hits_t / reps


def test_uncensored_fit_equals_linregress():
    rng = np.random.default_rng(1)
    K, T, _ = arrays(synthetic_runs(power(5000, -1.0), [1, 2, 3, 4, 6, 8], 6, 0.3, rng))
    fit = F.fit_power_law(K, T)
    ref = stats.linregress(np.log(K), np.log(T))          # reference library: scipy.stats.linregress
    assert fit.method == "ols"
    assert fit.slope == pytest.approx(ref.slope, rel=1e-12)
    assert fit.intercept == pytest.approx(ref.intercept, rel=1e-12)
    assert fit.slope_se == pytest.approx(ref.stderr, rel=1e-10)
    assert fit.intercept_se == pytest.approx(ref.intercept_stderr, rel=1e-10)
    assert fit.r2 == pytest.approx(ref.rvalue ** 2, rel=1e-10)


def test_censored_fit_matches_direct_maximisation_of_the_tobit_likelihood():
    rng = np.random.default_rng(3)
    runs = synthetic_runs(power(5000, -1.0), [1, 2, 3, 4, 6, 8], 6, 0.3, rng, budget=3000)
    K, T, C = arrays(runs)
    assert 3 <= C.sum() <= 20
    fit = F.fit_power_law(K, T, C)
    x, y = np.log(K), np.log(T)

    def nll(th):  # Tobin (1958) censored-normal likelihood, written with scipy.stats.norm
        mu, sd = th[0] + th[1] * x, math.exp(th[2])
        return -np.where(C, stats.norm.logsf(y, mu, sd), stats.norm.logpdf(y, mu, sd)).sum()

    ref = optimize.minimize(nll, [8.0, -1.0, math.log(0.3)], method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000})
    assert fit.method == "tobit" and fit.converged
    assert fit.intercept == pytest.approx(ref.x[0], abs=1e-6)
    assert fit.slope == pytest.approx(ref.x[1], abs=1e-6)
    assert fit.sigma == pytest.approx(math.exp(ref.x[2]), rel=1e-5)
    assert fit.loglik == pytest.approx(-ref.fun, abs=1e-8)


def test_known_exponents_are_recovered_and_dropping_censored_runs_biases_the_slope():
    # Invented runs, T = 20000 K^-1 with log-normal scatter, budget 12000: the shallow
    # depths are partly censored. Dropping censored runs keeps only the lucky fast runs
    # there and flattens the slope (selection bias of truncated samples; Tobin 1958,
    # from memory); the censored likelihood does not.
    rng = np.random.default_rng(4)
    tobit, naive = [], []
    for _ in range(30):
        runs = synthetic_runs(power(20000, -1.0), [1, 2, 3, 4, 6, 8, 12], 6, 0.4, rng,
                              budget=12000)
        K, T, C = arrays(runs)
        tobit.append(F.fit_power_law(K, T, C).slope)
        naive.append(stats.linregress(np.log(K[~C]), np.log(T[~C])).slope)
    se_tobit, se_naive = np.std(tobit) / math.sqrt(30), np.std(naive) / math.sqrt(30)
    assert abs(np.mean(tobit) + 1.0) < max(3 * se_tobit, 0.03)
    assert np.mean(naive) + 1.0 > 4 * se_naive    # measurably flatter than the truth
    assert np.mean(naive) + 1.0 > 0.08
    for s_true in (-0.5, -1.5):                   # uncensored recovery, within 3 standard errors
        K, T, C = arrays(synthetic_runs(power(3000, s_true), [1, 2, 3, 4, 6, 8], 5, 0.2, rng))
        fit = F.fit_power_law(K, T, C)
        assert abs(fit.slope - s_true) < 3 * fit.slope_se


def test_bootstrap_interval_for_the_slope_covers_the_truth_about_95_percent():
    # Efron and Tibshirani (1993), An Introduction to the Bootstrap: percentile intervals
    # reach close to their nominal coverage; 200 invented repetitions, 8 seeds per depth.
    boot, analytic = _coverage(reps=200, budget=math.inf, n_boot=200, seed=5)
    assert 0.90 <= boot <= 0.99
    assert 0.90 <= analytic <= 0.99      # t interval of OLS, exact under normal errors


def test_bootstrap_interval_coverage_with_censored_runs():
    # Same check (Efron and Tibshirani 1993) with about 15 % of the invented runs censored.
    boot, _ = _coverage(reps=300, budget=4000, n_boot=200, seed=6)
    assert 0.90 <= boot <= 0.99


def test_unconverged_censored_fit_warns():
    rng = np.random.default_rng(7)
    K, T, C = arrays(synthetic_runs(power(5000, -1.0), [1, 2, 4, 8], 4, 0.3, rng, budget=2500))
    with pytest.warns(ConvergenceWarning, match="raise max_updates"):
        fit = F.fit_power_law(K, T, C, max_iter=1)
    assert not fit.converged


def test_segmented_regression_recovers_a_known_breakpoint():
    # Muggeo (2003), Statistics in Medicine 22:3055: the iterative fit recovers the
    # breakpoint of a continuous broken line; invented runs broken at K = 6.
    rng = np.random.default_rng(8)
    K, T, C = arrays(synthetic_runs(broken(6000, -1.0, 1.2, 6.0), range(1, 13), 5, 0.1, rng))
    seg = F.fit_segmented(K, T, C)
    assert seg.converged and seg.n_iter < 30
    assert seg.breakpoint == pytest.approx(6.0, abs=0.5)
    assert seg.falling_slope == pytest.approx(-1.0, abs=0.15)
    assert seg.rising_slope == pytest.approx(1.2, abs=0.3)
    single = F.fit_power_law(K, T, C)
    assert F.bic(seg.loglik, 5, seg.n) < F.bic(single.loglik, 3, single.n)


def test_segmented_regression_with_censored_deep_runs():
    # Muggeo (2003) broken line, with the Tobit likelihood: invented runs broken at
    # K = 5, deep runs partly hitting the budget.
    rng = np.random.default_rng(9)
    K, T, C = arrays(synthetic_runs(broken(4000, -1.0, 1.5, 5.0), range(1, 11), 6, 0.15, rng,
                                    budget=2500))
    assert C.sum() >= 5
    seg = F.fit_segmented(K, T, C)
    assert seg.breakpoint == pytest.approx(5.0, abs=0.6)
    assert seg.rising_slope == pytest.approx(1.5, abs=0.4)


def test_two_term_model_minimum_follows_the_closed_form():
    # DESIGN.md section 2: T = A K^s + B K^r has its minimum at (-s A / (r B))^(1/(r - s)).
    A, B, s, r = 4000.0, 5.0, -1.0, 2.0
    k_star = (-s * A / (r * B)) ** (1 / (r - s))
    rng = np.random.default_rng(14)
    K, T, C = arrays(synthetic_runs(lambda k: math.log(A * k ** s + B * k ** r), range(1, 17), 4,
                                    0.03, rng))
    tt = F.fit_two_term(K, T, C)
    assert tt.converged
    assert tt.minimum_depth == pytest.approx(k_star, rel=0.05)
    assert tt.minimum_depth == pytest.approx((-tt.s * tt.A / (tt.r * tt.B)) ** (1 / (tt.r - tt.s)))

