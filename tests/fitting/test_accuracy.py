"""Validation accuracy per depth and the guard on the depth to plan for (depthplan.fitting.accuracy).

The runs are invented (seeded synthetic draws from a known law, fitting_data.law_runs); reference
values come from numpy's median and from worked examples computed by hand beside each check.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from depthplan.fitting.accuracy import accuracy_check, accuracy_fields
from depthplan.fitting.assemble import fit_runs
from depthplan.fitting.summary import format_summary

from fitting_data import law_runs, run


# ---------------------------------------------------------------- through the fit

def test_per_depth_accuracy_is_the_median_and_spread_over_seeds():
    rng = np.random.default_rng(3)
    runs = law_runs(-0.8, accuracy=lambda k, r: float(rng.uniform(0.6, 0.9)))
    fit = fit_runs(runs, n_boot=40)
    for row in fit["per_depth"]:
        acc = [r.validation_accuracy for r in runs if r.depth == row["depth"]]
        assert row["validation_accuracy"] == pytest.approx(np.median(acc))          # numpy
        assert [row["validation_accuracy_lo"], row["validation_accuracy_hi"]] == [min(acc), max(acc)]
        assert row["validation_accuracy_spread"] == "min_max"
    assert accuracy_fields([])["validation_accuracy"] is None


def test_a_planned_depth_with_clearly_worse_accuracy_is_flagged_first():
    # accuracy falls 1.5 points per layer, seed noise 0.3 points: deep is clearly worse than K = 1
    worse = law_runs(-0.8, accuracy=lambda k, rng: 0.80 - 0.015 * k + rng.normal(0, 0.003))
    fit = fit_runs(worse, n_boot=40)
    check = fit["planning"]["accuracy_check"]
    rec = fit["planning"]["recommended_depth"]
    assert rec > 1 and check["clearly_below"] and check["best_depth"] == 1
    assert "clearly lower validation accuracy" in fit["warnings"][0]
    lines = format_summary(fit).splitlines()
    assert lines[1].startswith("Recommended depth")
    assert lines[2].startswith("Accuracy warning:") and "K = 1" in lines[2]
    # the same law with accuracy level across depths (spreads overlap): no warning
    level = law_runs(-0.8, accuracy=lambda k, rng: 0.80 + rng.normal(0, 0.01))
    fit = fit_runs(level, n_boot=40)
    assert not fit["planning"]["accuracy_check"]["clearly_below"]
    assert not any("validation accuracy" in w for w in fit["warnings"])
    assert "Accuracy warning" not in format_summary(fit)


# ---------------------------------------------------------------- the functions on their own

def test_accuracy_fields_skip_unmeasured_runs_and_keep_diverged_ones():
    # worked by hand: the measured values are 0.8, 0.6 and 0.9 (the diverged run's 0.6 counts),
    # so the median is 0.8 and the spread 0.6 to 0.9; NaN and None are not measurements
    runs = [run(2, 100, validation_accuracy=0.8), run(2, 100, "diverged", validation_accuracy=0.6),
            run(2, 100, validation_accuracy=0.9), run(2, 100, validation_accuracy=math.nan),
            run(2, 100, validation_accuracy=None)]
    assert accuracy_fields(runs) == {"validation_accuracy": 0.8, "validation_accuracy_lo": 0.6,
                                     "validation_accuracy_hi": 0.9, "validation_accuracy_spread": "min_max"}
    assert accuracy_fields([run(1, 10)]) == {"validation_accuracy": None, "validation_accuracy_lo": None,
                                             "validation_accuracy_hi": None,
                                             "validation_accuracy_spread": None}


def _row(depth: int, median: float, lo: float, hi: float) -> dict:
    return {"depth": depth, "validation_accuracy": median, "validation_accuracy_lo": lo,
            "validation_accuracy_hi": hi}


ROWS = [_row(1, 0.90, 0.88, 0.91), _row(2, 0.89, 0.87, 0.90), _row(4, 0.80, 0.79, 0.81),
        _row(8, 0.70, 0.69, 0.71)]


def test_an_unswept_planned_depth_is_judged_at_the_nearest_depth_on_a_log_scale():
    # worked by hand: for K = 6, |ln(4/6)| = 0.405 and |ln(8/6)| = 0.288, so K = 8 is nearer on a
    # log scale (on a linear one 4 and 8 would tie); its seeds (0.69-0.71) lie below K = 1's (0.88-0.91)
    check = accuracy_check(ROWS, 6)
    assert (check["depth"], check["accuracy"], check["best_depth"], check["best_accuracy"]) == (8, 0.70, 1, 0.90)
    assert check["clearly_below"]
    assert ("the depth to plan for, K = 6 (nearest swept depth K = 8), has clearly lower validation "
            "accuracy (median 70.0 %, seeds 69.0-71.0 %) than K = 1 (median 90.0 %, seeds "
            "88.0-91.0 %)") in check["note"]
    assert accuracy_check(ROWS, 8)["note"].startswith("the depth to plan for, K = 8, has")


def test_overlapping_spreads_are_not_clearly_below():
    # K = 2's median (0.89) is below K = 1's (0.90), but its top seed (0.90) is above K = 1's lowest (0.88)
    check = accuracy_check(ROWS, 2)
    assert check["depth"] == 2 and check["best_depth"] == 1
    assert not check["clearly_below"] and check["note"] == ""
    best = accuracy_check(ROWS, 1)
    assert best["depth"] == best["best_depth"] == 1 and not best["clearly_below"]


def test_nothing_to_compare_says_why():
    assert accuracy_check([], 4)["note"] == "validation accuracy was not measured"
    one = accuracy_check(ROWS[:1], 4)
    assert one["depth"] is None and not one["clearly_below"] and one["note"] == ""
    assert accuracy_check(ROWS, None)["depth"] is None
    unmeasured = [{"depth": 1, "validation_accuracy": None}, {"depth": 2, "validation_accuracy": None}]
    assert accuracy_check(unmeasured, 2)["note"] == "validation accuracy was not measured"
