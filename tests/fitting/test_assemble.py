"""fit.json as a whole: rate groups, warnings, left-out runs, the schema, bad input (depthplan.fitting.assemble).

Every data set here is invented (seeded synthetic runs drawn from a known law), and named as
such; sources of the reference values are given beside each check.
"""
from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pytest
from scipy import stats

from depthplan import fitting as F
from depthplan.errors import ConfigError, DataError

from fitting_data import ROOT, arrays, broken, power, run, synthetic_runs


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

