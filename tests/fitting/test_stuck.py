"""Tests of depthplan.fitting.stuck: a stuck run among converged siblings, end to end through a table.

The table is invented, shaped like the case in the issue: medians about 41,000 / 26,100 /
16,800 / 11,200 / 9,800 updates at K = 2 / 4 / 8 / 16 / 32, three seeds each, one K = 32 seed
censored at 60,000 while its two siblings converged near 9,800.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from depthplan.cli import main
from depthplan.fitting import fit_power_law
from depthplan.fitting.inputs import read_table
from depthplan.fitting.stuck import STUCK_FACTOR, find_stuck

ROWS = [(2, 0, 39000), (2, 1, 41000), (2, 2, 43100), (4, 0, 24800), (4, 1, 26100), (4, 2, 27400),
        (8, 0, 16000), (8, 1, 16800), (8, 2, 17600), (16, 0, 10600), (16, 1, 11200),
        (16, 2, 11800), (32, 0, 9600), (32, 1, 9800)]


def _table(tmp_path, budget: int):
    lines = ["depth,seed,iterations,status"] + [f"{k},{s},{t},converged" for k, s, t in ROWS]
    lines.append(f"32,2,{budget},censored")
    path = tmp_path / "timings.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _fit(tmp_path, capsys, budget: int):
    path = _table(tmp_path, budget)
    out = tmp_path / "fit.json"
    assert main(["fit", str(path), "--json", str(out), "--bootstrap", "60"]) == 0
    return path, json.loads(out.read_text(encoding="utf-8")), capsys.readouterr().out


def test_stuck_run_is_named_left_out_and_the_law_recovered(tmp_path, capsys):
    path, fit, text = _fit(tmp_path, capsys, 60000)
    # the flip the issue measured: the run taken as a lower bound drags the Tobit law
    # (Tobin 1958 censored likelihood) to a slope whose interval reaches 0
    runs = read_table(path)
    K = [r.depth for r in runs]
    T = [r.iterations for r in runs]
    C = [r.status == "censored" for r in runs]
    dragged = fit_power_law(K, T, C)
    assert dragged.slope > -0.45 and dragged.r2 < 0.5
    # reference: scipy.stats.linregress on the 14 converged runs (the run left out)
    ref = stats.linregress(np.log(K[:-1]), np.log(T[:-1]))
    pl = fit["power_law"]
    assert pl["slope"] == pytest.approx(ref.slope, rel=1e-9)
    assert pl["slope"] == pytest.approx(-0.57, abs=0.05)       # the value without the run
    assert pl["r2"] > 0.95 and pl["n_censored"] == 0
    assert fit["depth_gain"] is True
    assert fit["planning"]["recommended_depth"] > 2
    assert fit["stuck_runs"] == [{"depth": 32, "seed": 2, "budget": 60000}]
    row = {r["depth"]: r for r in fit["per_depth"]}[32]
    assert (row["stuck"], row["censored"], row["converged"]) == (1, 1, 2)
    assert row["stuck_rate"] == pytest.approx(1 / 3)
    assert row["median"] == 9700                  # of the two runs that trained
    assert any("a 32-layer net got stuck 1 of 3 times (seed 2 at 60000 updates" in w
               for w in fit["warnings"])
    assert "Stuck runs: a 32-layer net got stuck 1 of 3 times (seed 2)" in text


def test_merely_slow_run_stays_a_censored_observation(tmp_path, capsys):
    # censored at 12,000, near where its siblings finished: a slow run, not a stuck one
    assert 12000 < STUCK_FACTOR * 9800
    _, fit, text = _fit(tmp_path, capsys, 12000)
    assert fit["stuck_runs"] == [] and "Stuck runs" not in text
    assert fit["power_law"]["n_censored"] == 1 and fit["power_law"]["method"] == "tobit"
    assert {r["depth"]: r for r in fit["per_depth"]}[32]["stuck"] == 0


def test_the_rule_needs_two_converged_siblings_and_the_factor(tmp_path):
    runs = read_table(_table(tmp_path, 60000))
    assert [(r.depth, r.seed) for r in find_stuck(runs)] == [(32, 2)]
    lone = [r for r in runs if not (r.depth == 32 and r.seed == 1)]     # one sibling left
    assert find_stuck(lone) == []
    just_under = read_table(_table(tmp_path, math.floor(STUCK_FACTOR * 9800)))
    assert find_stuck(just_under) == []
