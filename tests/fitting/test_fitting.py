"""Tests of depthplan.fitting.assemble.

Every data set here is invented (seeded synthetic runs drawn from a known law),
and named as such; sources of the reference values are given beside each check.
"""
from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize, stats

from depthplan import fitting as F
from depthplan.fitting import assemble, depthlaw
from depthplan.errors import ConfigError, ConvergenceWarning, DataError
from depthplan.records import RunResult

ROOT = Path(__file__).resolve().parents[2]


def run(depth: int, iterations: float, status: str = "converged", *, seed: int = 0,
        lr: float = 0.1, lr_mode: str = "fixed", sec: float = math.nan, **extra) -> RunResult:
    return RunResult(depth=int(depth), width=16, seed=seed, learning_rate=lr, status=status,
                     iterations=int(round(iterations)), wall_seconds=math.nan,
                     seconds_per_update=sec, final_train_loss=math.nan,
                     final_train_accuracy=math.nan, validation_accuracy=math.nan, n_params=0,
                     lr_mode=lr_mode, **extra)


def synthetic_runs(log_t, depths, n_seeds: int, sigma: float, rng, *, budget: float = math.inf,
                   **kw) -> list[RunResult]:
    """Invented runs: log T = log_t(K) + N(0, sigma^2), censored at `budget`."""
    out = []
    for k in depths:
        for s in range(n_seeds):
            t = math.exp(log_t(k) + rng.normal(0.0, sigma))
            out.append(run(k, min(t, budget), "censored" if t >= budget else "converged",
                           seed=s, **kw))
    return out


def power(c: float, s: float):
    return lambda k: math.log(c) + s * math.log(k)


def broken(c: float, s: float, r: float, k_break: float):
    return lambda k: (math.log(c) + s * math.log(k)
                      + (r - s) * max(math.log(k) - math.log(k_break), 0.0))


def arrays(runs):
    return (np.array([r.depth for r in runs], float), np.array([r.iterations for r in runs], float),
            np.array([r.status == "censored" for r in runs]))


# ------------------------------------------------------------------ power law, OLS and Tobit

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


def test_fit_runs_on_uncensored_runs_equals_linregress_on_every_run():
    rng = np.random.default_rng(2)
    runs = synthetic_runs(power(4000, -1.2), [1, 2, 3, 4, 5, 6], 5, 0.1, rng)
    fit = F.fit_runs(runs, n_boot=100)
    K, T, _ = arrays(runs)
    ref = stats.linregress(np.log(K), np.log(T))          # reference library: scipy.stats.linregress
    assert fit["power_law"]["depths_used"] == [1, 2, 3, 4, 5, 6]
    assert fit["power_law"]["slope"] == pytest.approx(ref.slope, rel=1e-12)
    assert fit["power_law"]["slope_se"] == pytest.approx(ref.stderr, rel=1e-10)
    assert fit["power_law"]["r2"] == pytest.approx(ref.rvalue ** 2, rel=1e-10)


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


def _coverage(reps: int, budget: float, n_boot: int, seed: int) -> tuple[float, float]:
    rng = np.random.default_rng(seed)
    hits_boot = hits_t = 0
    for i in range(reps):
        runs = synthetic_runs(power(8000, -1.0), [1, 2, 3, 4, 6, 8], 8, 0.3, rng, budget=budget)
        d = depthlaw._Arrays(*arrays(runs))
        block, _ = depthlaw._power_law_block(d, n_boot, seed=i)
        lo, hi = block["slope_ci"]
        hits_boot += lo <= -1.0 <= hi
        lo, hi = block["slope_ci_analytic"]
        hits_t += lo <= -1.0 <= hi
    return hits_boot / reps, hits_t / reps


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


# ------------------------------------------------------------------ segmented regression

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


def test_reversal_observed_at_seven_to_eight_layers():
    # Common practice (DESIGN.md section 3): on handwritten digits the gain from depth
    # reverses at around 7 to 8 hidden layers. Invented runs shaped that way (break 7.5).
    rng = np.random.default_rng(10)
    runs = synthetic_runs(broken(8000, -1.0, 1.0, 7.5), range(1, 13), 5, 0.1, rng)
    fit = F.fit_runs(runs, n_boot=150)
    rev = fit["reversal"]
    assert rev["status"] == "observed" and fit["depth_gain"]
    assert 6.5 <= rev["depth"] <= 8.5
    assert rev["depth_ci"][0] <= 7.5 <= rev["depth_ci"][1] + 0.5
    assert rev["rising_slope_ci"][0] > 0 and rev["n_depths_past"] >= 2
    assert rev["bic_segmented"] < rev["bic_single"]
    assert max(fit["power_law"]["depths_used"]) <= rev["depth"]
    assert abs(rev["smooth_depth"] - rev["depth"]) < 1.5
    assert fit["planning"]["model"] == "segmented"
    assert fit["planning"]["last_depth_worth_adding"]["depth"] <= 8
    assert fit["curve"]["model"] == "segmented"


def test_a_single_point_past_the_minimum_is_never_a_reversal():
    rng = np.random.default_rng(11)
    runs = synthetic_runs(power(5000, -1.0), range(1, 9), 5, 0.1, rng)
    runs += synthetic_runs(lambda k: math.log(5000 / 8) + 1.0, [9], 5, 0.1, rng)
    fit = F.fit_runs(runs, n_boot=100)
    rev = fit["reversal"]
    assert rev["status"] == "beyond_range"
    assert rev["depth"] is None and rev["depth_ci"] is None
    assert rev["rise_suspected"]
    assert fit["power_law"]["depths_used"] == list(range(1, 9))
    assert any("not established" in w for w in fit["warnings"])
    # the law alone would say 20 layers; T turned up past 8, so no deeper advice than that
    assert fit["planning"]["last_depth_worth_adding"]["depth"] == pytest.approx(20, abs=3)
    assert fit["planning"]["recommended_depth"] == 8


def test_still_falling_at_the_deepest_depth_is_beyond_range():
    rng = np.random.default_rng(12)
    fit = F.fit_runs(synthetic_runs(power(5000, -0.8), range(1, 9), 4, 0.1, rng), n_boot=100)
    assert fit["reversal"]["status"] == "beyond_range"
    assert "still falls" in fit["reversal"]["note"]
    assert fit["depth_gain"] and fit["power_law"]["alpha"] is not None


def test_no_gain_from_depth_means_no_alpha_and_no_reversal():
    rng = np.random.default_rng(13)
    for s_true in (0.3, 0.0):
        fit = F.fit_runs(synthetic_runs(power(2000, s_true), range(1, 8), 4, 0.2, rng), n_boot=100)
        assert fit["depth_gain"] is False
        assert fit["power_law"]["alpha"] is None and fit["power_law"]["alpha_ci"] is None
        assert fit["reversal"]["status"] == "none"
        assert fit["planning"]["recommended_depth"] == 1


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


def test_warns_when_segmented_and_smooth_models_disagree(monkeypatch):
    rng = np.random.default_rng(15)
    runs = synthetic_runs(broken(8000, -1.0, 1.0, 7.5), range(1, 13), 5, 0.1, rng)
    far = F.TwoTermFit(A=1.0, B=1.0, s=-1.0, r=1.0, sigma=0.1, loglik=0.0, minimum_depth=11.0,
                       converged=True)
    monkeypatch.setattr(assemble, "fit_two_term", lambda *a, **k: far)
    fit = F.fit_runs(runs, n_boot=60)
    assert any("disagree by more than one layer" in w for w in fit["warnings"])


# ------------------------------------------------------------------ planning

def test_last_depth_worth_adding_by_arithmetic():
    # For T ~ K^-1 the next layer saves 1 - K/(K+1): under 5 % first at K = 20, under 10 % at 10.
    assert F.last_depth_worth_adding("power_law", [[5.0, -1.0]], 0.05)[0] == 20
    assert F.last_depth_worth_adding("power_law", [[5.0, -1.0]], 0.10)[0] == 10
    # a broken line rising after K = 6: the layer past the break never pays
    psi = math.log(6.0)
    assert F.last_depth_worth_adding("segmented", [[5.0, -3.0, 5.0, psi]], 0.05)[0] == 6


def test_compute_optimal_depth_matches_calculus():
    # d/dK [K^s (u + v K)] = 0 at K = -s u / ((1 + s) v) (elementary calculus).
    s, u, v = -0.6, 2.0, 0.1
    expected = -s * u / ((1 + s) * v)
    got = F.compute_optimal_depth("power_law", [[3.0, s]], (u, v))[0]
    assert abs(got - expected) <= 1
    assert math.isnan(F.compute_optimal_depth("power_law", [[3.0, -1.2]], (u, v))[0])
    assert F.fit_cost_model([1, 2, 4], [1.2, 1.4, 1.8]) == pytest.approx((1.0, 0.2))


def test_planning_figures_in_a_fit_are_flagged_when_extrapolated():
    rng = np.random.default_rng(16)
    runs = synthetic_runs(power(5000, -1.0), range(1, 9), 4, 0.02, rng)
    runs = [RunResult(**{**r.__dict__, "seconds_per_update": 1e-3 * (1 + 0.05 * r.depth)})
            for r in runs]
    fit = F.fit_runs(runs, n_boot=100)
    plan = fit["planning"]
    assert plan["last_depth_worth_adding"]["depth"] == 20
    assert plan["last_depth_worth_adding"]["extrapolated"]
    assert plan["compute_optimal_depth"]["depth"] is None     # s = -1: time keeps falling
    assert any("extrapolated" in w for w in fit["warnings"])
    assert plan["recommended_extrapolated"]


# ------------------------------------------------------------------ per-depth rows

def test_median_only_under_half_censored_quartiles_only_under_a_quarter():
    runs = ([run(1, t) for t in (100, 200, 300, 400)] + [run(1, 1000, "censored")]
            + [run(2, t) for t in (100, 200, 300)] + [run(2, 1000, "censored")] * 2
            + [run(3, t) for t in (100, 200)] + [run(3, 1000, "censored")] * 3
            + [run(3, 50, "diverged")])
    rows = {r["depth"]: r for r in F.summarize_depths(runs)}
    assert (rows[1]["median"], rows[1]["q25"], rows[1]["q75"]) == (300, 200, 400)
    assert rows[2]["median"] == 300 and rows[2]["q25"] is None
    assert rows[2]["quartile_note"] == "more than the budget"
    assert rows[3]["median"] is None and rows[3]["median_note"] == "more than the budget"
    assert (rows[3]["runs"], rows[3]["converged"], rows[3]["censored"], rows[3]["diverged"]) == \
        (6, 2, 3, 1)
    assert rows[3]["budget"] == 1000


# ------------------------------------------------------------------ probes

def test_growth_exponent_of_random_walk_and_drift():
    # Feller, An Introduction to Probability Theory, vol. 1: the variance of a sum of
    # independent steps grows linearly, so ||W_t - W_0|| grows as t^(1/2); steady drift
    # grows as t^1. Invented walk in 400 dimensions.
    rng = np.random.default_rng(17)
    steps = np.unique(np.geomspace(1, 4000, 30).astype(int))
    walk = np.cumsum(rng.normal(size=(4000, 400)), axis=0)
    disp = np.linalg.norm(walk[steps - 1], axis=1)
    assert F.growth_exponent(steps, disp) == pytest.approx(0.5, abs=0.05)
    assert F.growth_exponent(steps, 0.01 * steps) == pytest.approx(1.0, abs=1e-9)
    assert math.isnan(F.growth_exponent([1, 2], [1.0, 2.0]))


def synthetic_probes(t0: float, drop_to: float = -20.0):
    """Invented probes: drift (D ~ t) until t0, diffusion (D ~ sqrt(t)) after; SNR a
    sigmoid in log-step from +20 dB to `drop_to` dB centred on t0."""
    steps = np.unique(np.geomspace(1, 100 * t0, 40).astype(int)).astype(float)
    disp = np.where(steps < t0, steps, np.sqrt(steps * t0))
    snr = drop_to + (20.0 - drop_to) / (1 + np.exp(3 * (np.log(steps) - math.log(t0))))
    return steps, disp, snr


def test_drift_then_diffusion_and_the_snr_drop():
    # Common practice (DESIGN.md section 3): weights grow about linearly, then about as
    # the square root of the step; the gradient SNR falls by roughly 40 dB (+20 to -20)
    # across the transition. Checked on invented probe curves of that shape.
    steps, disp, snr = synthetic_probes(300.0)
    t_tr = F.transition_step(steps, snr)
    assert t_tr == pytest.approx(300, rel=0.15)
    assert F.snr_drop_db(steps, snr) == pytest.approx(40, abs=3)
    assert F.growth_exponent(steps, disp, start=t_tr) == pytest.approx(0.5, abs=0.05)
    early = steps <= t_tr
    assert F.growth_exponent(steps[early], disp[early], late_fraction=1.0) == pytest.approx(1.0,
                                                                                          abs=0.05)
    flat = np.full_like(steps, 10.0)
    assert math.isnan(F.transition_step(steps, flat))


def test_diffusion_summary_sits_beside_alpha():
    rng = np.random.default_rng(18)
    steps, disp, snr = synthetic_probes(200.0)
    runs = [RunResult(**{**r.__dict__, "probe_steps": tuple(steps),
                         "displacement": (tuple(disp), tuple(1.5 * disp)),
                         "snr_db": (tuple(snr), tuple(snr))})
            for r in synthetic_runs(power(5000, -1.0), range(1, 7), 3, 0.1, rng)]
    fit = F.fit_runs(runs, n_boot=60)
    diff = fit["diffusion"]
    assert diff["n_runs"] == 18 and len(diff["layers"]) == 12
    assert diff["late_exponent_median"] == pytest.approx(0.5, abs=0.05)
    assert diff["snr_drop_db_median"] == pytest.approx(40, abs=3)
    assert diff["alpha"] == fit["power_law"]["alpha"]
    assert "Probes:" in F.format_summary(fit)


def test_alpha_one_half_means_slope_minus_one():
    # Common practice (DESIGN.md sections 2-3): free diffusion, alpha = 1/2, gives s = -1.
    assert depthlaw._alpha(-1.0) == 0.5
    rng = np.random.default_rng(19)
    fit = F.fit_runs(synthetic_runs(power(5000, -1.0), range(1, 9), 6, 0.15, rng), n_boot=200)
    lo, hi = fit["power_law"]["alpha_ci"]
    assert lo <= 0.5 <= hi


# ------------------------------------------------------------------ rates, warnings, output

def test_learning_rate_groups_get_their_own_fits_and_a_warning():
    # Invented runs: T = 1/(lr K) scaled (T * lr * K constant) at two fixed rates, and a
    # flat slope -0.2 with the rate tuned per depth.
    rng = np.random.default_rng(20)
    runs = synthetic_runs(lambda k: math.log(200 / (0.1 * k ** 1.1)), range(1, 8), 4, 0.1, rng,
                          lr=0.1)
    runs += synthetic_runs(lambda k: math.log(200 / (0.05 * k ** 1.1)), range(1, 8), 3, 0.1,
                           rng, lr=0.05)
    runs += synthetic_runs(power(1500, -0.2), range(1, 8), 4, 0.05, rng, lr_mode="tuned")
    fit = F.fit_runs(runs, n_boot=60)
    # the headline follows the rate tuned per depth when there is one (records.primary_group)
    assert fit["group"] == {"lr_mode": "tuned", "learning_rate": None, "n_runs": 28}
    assert [g["group"]["lr_mode"] for g in fit["by_learning_rate"]] == ["fixed", "fixed", "tuned"]
    inter = fit["lr_interaction"]
    assert inter["lr_exponent"] == pytest.approx(-1.0, abs=0.15)
    slopes = {(s["lr_mode"], s["learning_rate"]): s["slope"] for s in inter["slopes"]}
    assert slopes[("tuned", None)] == pytest.approx(-0.2, abs=0.1)
    assert slopes[("fixed", 0.1)] == pytest.approx(-1.1, abs=0.15)
    assert any("depth and learning rate interact" in w for w in fit["warnings"])
    assert "learning rate tuned per depth" in F.format_summary(fit)
    tuned_only = F.fit_runs([r for r in runs if r.lr_mode == "tuned"], n_boot=60)
    assert tuned_only["group"]["lr_mode"] == "tuned" and tuned_only["lr_interaction"] is None
    assert "tuned per depth" in F.format_summary(tuned_only)


def test_warnings_for_few_seeds_heavy_censoring_coarse_evaluation_and_diverged_runs():
    rng = np.random.default_rng(21)
    runs = synthetic_runs(power(3000, -1.0), [1, 2, 3, 4], 2, 0.2, rng, budget=2000)
    runs.append(run(4, 10, "diverged"))
    fit = F.fit_runs(runs, n_boot=60, eval_every=100)
    text = " | ".join(fit["warnings"])
    assert "only 4 depths swept" in text
    assert "as few as 2 finished runs" in text
    assert "heavy censoring at depth 1" in text
    assert "evaluation every 100 updates is coarse" in text
    assert "1 run diverged" in text


def test_failed_runs_and_search_trials_are_left_out_with_a_warning():
    rng = np.random.default_rng(28)
    runs = synthetic_runs(power(5000, -1.0), range(1, 6), 3, 0.1, rng)
    extra = [run(2, 40, "failed"), run(3, 900, lr=0.3, lr_mode="tuning")]
    fit = F.fit_runs(runs + extra, n_boot=60)
    assert fit["n_runs"] == len(runs) and fit["by_learning_rate"] == []
    assert fit["warnings"][0].startswith("2 runs failed, unfinished or from a learning-rate search")


def test_single_run_per_depth_uses_residual_bootstrap():
    rng = np.random.default_rng(22)
    fit = F.fit_runs(synthetic_runs(power(5000, -1.0), range(1, 9), 1, 0.1, rng), n_boot=200)
    pl = fit["power_law"]
    assert pl["ci_method"] == "residuals"
    assert pl["slope_ci"][0] < pl["slope"] < pl["slope_ci"][1]
    assert any("resample residuals" in w for w in fit["warnings"])


def test_capacity_limited_shallowest_depth_is_reported():
    rng = np.random.default_rng(23)
    law = power(5000, -0.7)
    runs = synthetic_runs(lambda k: law(k) + (1.0 if k == 1 else 0.0), range(1, 9), 5, 0.08, rng)
    fit = F.fit_runs(runs, n_boot=100)
    without = fit["power_law"]["without_shallowest"]
    assert without["depths_used"] == list(range(2, 9))
    assert without["slope"] == pytest.approx(-0.7, abs=0.1)
    assert fit["power_law"]["slope"] < -0.9
    assert any("shallowest depth steepens the slope" in w for w in fit["warnings"])


def test_fit_json_is_versioned_complete_and_free_of_nan():
    rng = np.random.default_rng(24)
    for runs in (synthetic_runs(power(2000, 0.2), range(1, 6), 3, 0.2, rng),
                 synthetic_runs(broken(8000, -1.0, 1.0, 6.0), range(1, 12), 4, 0.1, rng,
                                budget=6000)):
        fit = F.fit_runs(runs, n_boot=60)
        text = json.dumps(fit, allow_nan=False)
        back = json.loads(text)
        assert back["schema"] == F.SCHEMA
        for key in ("slope", "slope_ci", "alpha", "alpha_ci", "r2", "depths_used"):
            assert key in back["power_law"]
        for key in ("status", "depth", "depth_ci"):
            assert key in back["reversal"]
        for key in ("depth_gain", "per_depth", "planning", "warnings", "curve"):
            assert key in back


def test_power_law_curve_and_stored_band():
    rng = np.random.default_rng(25)
    fit = F.fit_runs(synthetic_runs(power(5000, -1.0), range(1, 9), 4, 0.1, rng), n_boot=100)
    pl = fit["power_law"]
    ks = np.array([1.0, 3.0, 8.0])
    med, lo, hi = F.power_law_curve(fit, ks)
    assert med == pytest.approx(np.exp(pl["intercept"] + pl["slope"] * np.log(ks)))
    assert (lo < med).all() and (med < hi).all()
    curve = fit["curve"]
    assert len(curve["depths"]) == 60 and curve["model"] == "power_law"
    assert all(a <= m <= b for a, m, b in zip(curve["lo"], curve["median"], curve["hi"]))


def test_summary_names_the_figures_and_the_proxy_caution():
    rng = np.random.default_rng(26)
    fit = F.fit_runs(synthetic_runs(power(5000, -1.0), range(1, 9), 4, 0.1, rng), n_boot=60)
    text = F.format_summary(fit)
    assert "Recommended depth: " in text
    assert f"s = {fit['power_law']['slope']:.2f}" in text
    assert "Alpha = " in text and "Reversal: beyond range" in text
    assert "proxy" in text


def test_bad_inputs_are_refused():
    rng = np.random.default_rng(27)
    with pytest.raises(DataError, match=r"timings\.csv: runs at 2 depths \(1, 2\)"):
        F.fit_runs(synthetic_runs(power(100, -1.0), [1, 2], 3, 0.1, rng), source="timings.csv")
    all_censored = [run(k, 100, "censored") for k in (1, 2, 3) for _ in range(3)]
    with pytest.raises(DataError, match="raise the budget"):
        F.fit_runs(all_censored)
    with pytest.raises(DataError, match="no finished runs"):
        F.fit_runs([])
    with pytest.raises(ConfigError, match="save_fraction"):
        F.fit_runs(synthetic_runs(power(100, -1.0), [1, 2, 3], 3, 0.1, rng), save_fraction=1.5)


def test_import_leaves_torch_out():
    code = "import sys, depthplan.fitting.assemble; print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True,
                         check=True, env={"PYTHONPATH": str(ROOT), "PATH": ""})
    assert out.stdout.strip() == "False"
