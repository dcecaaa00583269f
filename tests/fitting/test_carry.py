"""Predict, then verify (fitting.carry, DESIGN.md section 8): a held-out proxy size against its prediction.

Seeded synthetic sweeps with a known answer (the broken-stick generator of fitting_data.sweep: the
corner moves as K*(W) = 2 W^0.5). A held-out width drawn from the same law must land inside the
widened interval; one whose corner is moved to three times the law's must land outside. The
widening is checked against its closed form (quadrature sum of the prediction's half-width and
1.96 x the measurement's standard error, on log K*).
"""
from __future__ import annotations

import json
import math

import pytest

from depthplan.fit_record import FitResult
from depthplan.fitting.assemble import fit_runs
from depthplan.records import write_runs_csv
from depthplan.forked import can_fork
from fitting_data import k_star, sweep

Z = 1.959963984540054


def test_a_held_out_width_on_the_law_lands_inside_and_stays_out_of_the_fit():
    runs = sweep([16, 32, 64]) + sweep([128], seed=9)
    fit = fit_runs(runs, n_boot=60, target={"width": 512, "train_rows": None}, holdout={"width": 128})
    t = fit["transfer"]
    assert [s["width"] for s in t["sizes"]] == [16, 32, 64]          # the held-out width is not in the trend
    v = t["verify"]
    assert v["width"] == 128 and v["prediction_source"] == "recomputed"
    assert abs(v["measured"]["reversal_depth"] / k_star(128) - 1) < 0.1
    assert abs(v["predicted"]["reversal_depth"] / k_star(128) - 1) < 0.15
    assert v["inside"] is True and v["slope_inside"] is True and "held once" in v["verdict"]
    # the prediction equals the one a fit of the smaller widths alone makes for width 128
    alone = fit_runs(sweep([16, 32, 64]), n_boot=60, target={"width": 128, "train_rows": None})
    assert v["predicted"]["reversal_depth"] == alone["transfer"]["target"]["reversal_depth"]
    # closed form of the widened interval on log K*
    p, m = v["predicted"], v["measured"]
    se_m = (math.log(m["reversal_depth_ci"][1]) - math.log(m["reversal_depth_ci"][0])) / (2 * Z)
    lp = math.log(p["reversal_depth"])
    lo = lp - math.hypot(lp - math.log(p["reversal_depth_ci"][0]), Z * se_m)
    hi = lp + math.hypot(math.log(p["reversal_depth_ci"][1]) - lp, Z * se_m)
    assert v["compared_interval"]["reversal_depth"] == pytest.approx([math.exp(lo), math.exp(hi)], rel=1e-9)
    # the headline is the largest proxy measured, the held-out one
    assert t["headline_size"] == {"width": 128, "train_rows": None}
    assert FitResult.from_dict(fit).transfer.verify.inside is True
    assert json.dumps(FitResult.from_dict(fit).to_dict(), indent=2) == json.dumps(fit, indent=2)


def test_a_held_out_width_off_the_law_lands_outside_and_is_said_first():
    off = sweep([128], corner=lambda w: 0.4 * k_star(w), seed=9)     # the corner at 0.4 x the law (9 layers, not 22.6)
    fit = fit_runs(sweep([16, 32, 64]) + off, n_boot=60, holdout={"width": 128})
    v = fit["transfer"]["verify"]
    assert v["inside"] is False and "OUTSIDE" in v["verdict"]
    assert fit["warnings"][0].startswith("transfer, held-out check: the measured K* lies OUTSIDE")


def test_the_prediction_stored_before_training_is_the_one_compared():
    stored = {"predicted_at": "2026-01-02T03:04:05+0000",
              "prediction": {"reversal_depth": 40.0, "reversal_depth_ci": [35.0, 45.0], "slope": -0.8,
                             "slope_ci": [-0.9, -0.7], "depth_to_plan_for": 20, "depth_to_plan_for_range": [18, 24]}}
    fit = fit_runs(sweep([16, 32, 64, 128]), n_boot=60, holdout={"width": 128, "stored": stored})
    v = fit["transfer"]["verify"]
    assert v["prediction_source"] == "stored before training" and v["predicted_at"] == stored["predicted_at"]
    assert v["predicted"]["reversal_depth"] == 40.0
    assert v["inside"] is False                                     # 22.6 measured against 35 to 45


def test_fit_of_a_folder_takes_target_and_held_out_size_from_sweep_json(tmp_path):
    from depthplan.fitting.assemble import fit_path

    write_runs_csv(sweep([16, 32, 64]) + sweep([128], seed=9), tmp_path / "runs.csv")
    (tmp_path / "sweep.json").write_text(json.dumps({"name": "w", "target": {"width": 256, "train_rows": None},
                                                     "verify": {"width": 128, "train_rows": None, "prediction": None}}))
    fit, _ = fit_path(tmp_path, n_boot=60)
    assert fit["transfer"]["target"]["width"] == 256 and fit["transfer"]["verify"]["width"] == 128
    fit, _ = fit_path(tmp_path, n_boot=60, target={"width": 1024, "train_rows": None})   # a flag overrides
    assert fit["transfer"]["target"]["width"] == 1024


@pytest.mark.skipif(not can_fork(), reason="needs two cores and fork")
def test_the_sizes_fitted_in_forked_processes_equal_the_fit_in_one_process(monkeypatch):
    """The reference is the plain loop in this process (DEPTHPLAN_SERIAL=1); the sizes follow
    the generator's known corner K* = 2 sqrt(width) (fitting_data.k_star)."""
    runs = sweep([16, 32, 64, 128])
    fits = {}
    for serial in ("1", "0"):
        monkeypatch.setenv("DEPTHPLAN_SERIAL", serial)
        fits[serial] = fit_runs(runs, n_boot=60, target={"width": 512, "train_rows": None})
    assert json.dumps(fits["0"]) == json.dumps(fits["1"])
    for row in fits["0"]["transfer"]["sizes"]:
        assert abs(row["reversal_depth"] / k_star(row["width"]) - 1) < 0.15
