"""Tests of the gap rule (depthplan.fitting.planning.depths_in_gaps) and a minimum between swept depths.

The table is invented: T = 13310/K + 5 K^2, whose minimum lies at K* = (13310 / (2 * 5))^(1/3)
= 11 exactly (calculus on the known law), swept only at K = 2, 4, 8, 16, 32 with four seeds
and log-normal scatter 0.05; nothing is swept between 8 and 16.
"""
from __future__ import annotations

import json
import math

import numpy as np

from depthplan.cli import main
from depthplan.config import AdaptiveConfig
from depthplan.fitting import fit_runs
from depthplan.fitting.inputs import read_table
from depthplan.fitting.planning import GAP_RATIO, depths_in_gaps, swept_gap
from depthplan.sweep.schedule import decide


def test_gap_rule_by_arithmetic():
    # 8 to 16 has ratio 2 > 1.3; 2 = 1.3^2.64, so two depths spaced evenly in log K fill it:
    # 8 * 2^(1/3) = 10.08 and 8 * 2^(2/3) = 12.70
    assert depths_in_gaps([(10.3, 10.3)], [2, 4, 8, 16, 32]) == [10, 13]
    assert depths_in_gaps([(8, 12)], [4, 8, 12]) == [10]               # 1.5: one depth
    assert depths_in_gaps([(8, 8)], [4, 8, 16]) == []                  # at a swept depth
    assert depths_in_gaps([(10.5, 10.5)], [8, 9, 10, 11, 12]) == []    # no gap above 1.3
    assert swept_gap(8, [4, 8, 16]) is None and swept_gap(9, [4, 8, 16]) == (8, 16)
    assert 12 / 10 <= GAP_RATIO and swept_gap(11, [10, 12]) is None


def _table(tmp_path):
    rng = np.random.default_rng(5)
    lines = ["depth,seed,iterations"]
    for k in (2, 4, 8, 16, 32):
        for s in range(4):
            t = (13310 / k + 5 * k * k) * math.exp(0.05 * rng.normal())
            lines.append(f"{k},{s},{round(t)}")
    path = tmp_path / "gap.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_minimum_inside_a_gap_is_a_range_with_depths_to_sweep_next(tmp_path, capsys):
    path = _table(tmp_path)
    out = tmp_path / "gap.fit.json"
    assert main(["fit", str(path), "--json", str(out), "--bootstrap", "100"]) == 0
    text = capsys.readouterr().out
    fit = json.loads(out.read_text(encoding="utf-8"))
    rev, plan = fit["reversal"], fit["planning"]
    assert rev["status"] == "observed" and 8 < rev["depth"] < 16
    assert abs(rev["depth"] - 11) < 1.5                                 # the known minimum
    assert {"figure": "reversal depth", "value": rev["depth"], "between": [8, 16]} in plan["gaps"]
    assert plan["next_depths"] and all(8 < k < 16 for k in plan["next_depths"])
    assert plan["recommended_range"] == [8, 16]
    assert fit["warnings"][0].startswith("the answer is not pinned down: the reversal depth")
    assert "sweep depths 10, 13 next" in fit["warnings"][0]
    second = text.splitlines()[1]
    assert second.startswith("Not settled: the reversal depth") and "between 8 and 16" in second


def test_adaptive_sweep_adds_the_depths_the_fit_names(tmp_path):
    runs = read_table(_table(tmp_path))
    policy = AdaptiveConfig(low=1, high=64, target_width=0.2, max_rounds=5, extra_seeds=0)
    d = decide(runs, policy, round_no=1, cpu_seconds=0.0, n_boot=100, seed=0)
    fit = fit_runs(runs, n_boot=100, seed=0)
    assert not d.stop
    assert d.add_depths == fit["planning"]["next_depths"] == [10, 13]
