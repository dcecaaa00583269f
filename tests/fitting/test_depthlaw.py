"""The per-depth table and the power-law block (depthplan.fitting.depthlaw).

Every data set here is invented (seeded synthetic runs drawn from a known law), and named as
such; sources of the reference values are given beside each check.
"""
from __future__ import annotations


import numpy as np
import pytest

from depthplan import fitting as F

from fitting_data import power, run, synthetic_runs


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


def test_single_run_per_depth_uses_residual_bootstrap():
    rng = np.random.default_rng(22)
    fit = F.fit_runs(synthetic_runs(power(5000, -1.0), range(1, 9), 1, 0.1, rng), n_boot=200)
    pl = fit["power_law"]
    assert pl["ci_method"] == "residuals"
    assert pl["slope_ci"][0] < pl["slope"] < pl["slope_ci"][1]
    assert any("resample residuals" in w for w in fit["warnings"])

