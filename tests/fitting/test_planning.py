"""Planning figures: last depth worth adding, compute-optimal depth, extrapolation flags, the stored band (depthplan.fitting.planning).

Every data set here is invented (seeded synthetic runs drawn from a known law), and named as
such; sources of the reference values are given beside each check.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from depthplan import fitting as F
from depthplan.records import RunResult

from fitting_data import power, synthetic_runs


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

