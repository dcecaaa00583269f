"""The reversal verdict of a fit (observed, beyond range, none) and its cross-checks (depthplan.fitting.assemble, depthlaw).

Every data set here is invented (seeded synthetic runs drawn from a known law), and named as
such; sources of the reference values are given beside each check.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from depthplan import fitting as F
from depthplan.fitting import assemble, depthlaw

from fitting_data import broken, power, synthetic_runs


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


def test_warns_when_segmented_and_smooth_models_disagree(monkeypatch):
    rng = np.random.default_rng(15)
    runs = synthetic_runs(broken(8000, -1.0, 1.0, 7.5), range(1, 13), 5, 0.1, rng)
    far = F.TwoTermFit(A=1.0, B=1.0, s=-1.0, r=1.0, sigma=0.1, loglik=0.0, minimum_depth=11.0,
                       converged=True)
    monkeypatch.setattr(assemble, "fit_two_term", lambda *a, **k: far)
    fit = F.fit_runs(runs, n_boot=60)
    assert any("disagree by more than one layer" in w for w in fit["warnings"])


def test_alpha_one_half_means_slope_minus_one():
    # Common practice (DESIGN.md sections 2-3): free diffusion, alpha = 1/2, gives s = -1.
    assert depthlaw.alpha_of(-1.0) == 0.5
    rng = np.random.default_rng(19)
    fit = F.fit_runs(synthetic_runs(power(5000, -1.0), range(1, 9), 6, 0.15, rng), n_boot=200)
    lo, hi = fit["power_law"]["alpha_ci"]
    assert lo <= 0.5 <= hi

