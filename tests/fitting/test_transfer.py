"""Carrying the depth law along proxy size (fitting.transfer, DESIGN.md section 8).

Seeded synthetic sweeps with a known answer: a broken-stick T(K) per width whose corner moves as
K*(W) = a W^b, with s constant or drifting with width. The per-size intervals are the existing
run-resampling bootstrap (Efron and Tibshirani 1993, An Introduction to the Bootstrap); the chain's
intervals are a parametric bootstrap of the weighted least-squares trend (module docstring).
"""
from __future__ import annotations

import math
import subprocess
import sys

import pytest

from depthplan.errors import ConfigError
from depthplan.fit_record import FitResult
from depthplan.fitting.assemble import fit_runs
from depthplan.fitting.transfer import fit_transfer
from depthplan.records import write_runs_csv

from fitting_data import k_star, sweep


def test_corner_moving_as_a_power_of_width_is_recovered_and_predicted_at_a_held_out_width():
    fit = fit_runs(sweep([16, 32, 64]), n_boot=100, target={"width": 128, "train_rows": None})
    t = fit["transfer"]
    assert t["status"] == "supported" and t["axes"] == ["width"]
    b = t["reversal_depth_law"]["by_axis"]["width"]
    assert abs(b["exponent"] - 0.5) < 0.1 and b["ci"][0] < 0.5 < b["ci"][1]
    pred = t["target"]
    truth = k_star(128)                                              # 22.6, not swept at this width
    assert abs(pred["reversal_depth"] / truth - 1) < 0.15
    assert pred["reversal_depth_ci"][0] < truth < pred["reversal_depth_ci"][1]
    assert pred["extrapolation_factor"] == {"width": 2.0}
    assert abs(pred["slope"] + 0.8) < 0.1
    assert pred["depth_to_plan_for"] is not None and pred["depth_to_plan_for_range"][0] <= pred["depth_to_plan_for"]
    # the headline stays the largest proxy's own answer, and says so
    assert fit["warnings"][0].startswith("runs at 3 proxy sizes: the figures above are the largest proxy's (width 64")
    assert FitResult.from_dict(fit).transfer.target.reversal_depth == pred["reversal_depth"]


def test_slope_drifting_with_width_is_measured():
    drift = -0.3                                             # ds / dlog W, invented for this test
    fit = fit_runs(sweep([16, 32, 64, 128], slope=lambda w: -0.6 + drift * math.log(w / 16)), n_boot=100,
                   target={"width": 256, "train_rows": None})
    c = fit["transfer"]["slope_law"]["by_axis"]["width"]
    assert abs(c["exponent"] - drift) < 0.08
    want = -0.6 + drift * math.log(256 / 16)
    s_ci = fit["transfer"]["target"]["slope_ci"]
    assert s_ci[0] < want < s_ci[1]


def test_prediction_intervals_cover_at_about_their_rate():
    # 95 % intervals for K* at a held-out width over repeated seeded sweeps (each a full per-size
    # bootstrap). Measured when written, with these settings: 33 of 40 covered (82 %), so the chain
    # under-covers somewhat at 20 bootstrap draws per size; the bound below (7 of 10) fails for
    # intervals that are badly off, not for that shortfall.
    covered = 0
    for rep in range(10):
        fit = fit_runs(sweep([16, 32, 64], seeds=2, sd=0.08, seed=100 + rep, depths=(2, 4, 6, 8, 11, 16, 22, 32, 64)),
                       n_boot=20, seed=rep, target={"width": 128, "train_rows": None})
        lo, hi = fit["transfer"]["target"]["reversal_depth_ci"]
        covered += lo < k_star(128) < hi
    assert covered >= 7


def test_corners_unrelated_to_width_are_not_carried():
    corners = {16: 16.0, 32: 7.0, 64: 22.0, 128: 9.0}              # no law along width
    fit = fit_runs(sweep(list(corners), corner=corners.get), n_boot=60, target={"width": 512, "train_rows": None})
    t = fit["transfer"]
    assert t["status"] == "not_supported" and "monotone" in t["reason"]
    assert t["target"]["depth_to_plan_for"] is None and t["target"]["reversal_depth"] is None
    assert any("transfer not supported by the data" in w for w in fit["warnings"])


def _worth_brute_force(s: float, save: float = 0.05) -> int:
    """The last depth worth adding under T = K^s, by walking K up until the next layer saves under 5 %."""
    k = 1
    while 1 - ((k + 1) / k) ** s >= save:
        k += 1
    return k


def test_the_depth_to_plan_for_is_carried_and_passes_its_held_out_check():
    # Seeded synthetic sizes with a known answer: corner K* = 2 W^0.5 and s = -0.8, so each size's
    # depth to plan for is the smaller of K* and the last depth worth adding (15 under K^-0.8, found
    # by brute force); at width 256 the rule gives that 15 (K* = 32), which a trend of the per-size
    # depths alone (8, 12, 15, ...) would overshoot.
    fit = fit_runs(sweep([16, 32, 64, 128]), n_boot=100, target={"width": 256, "train_rows": None},
                   holdout={"width": 128})
    t = fit["transfer"]
    v, tg = t["verify"], t["target"]
    assert v["depth_inside_range"] is True
    truth = min(_worth_brute_force(-0.8), round(k_star(256)))
    assert abs(tg["depth_to_plan_for"] - truth) <= 2
    assert tg["depth_to_plan_for_range"][0] <= truth <= tg["depth_to_plan_for_range"][1]
    assert tg["plan_settled"] is True and tg["past_swept_depths"] is False
    assert "the last depth worth adding at the carried s" in tg["plan_basis"]
    # a steep slope leaves K* the binding figure: the plan follows the corner (2 x 256^0.5 = 32)
    steep = fit_runs(sweep([16, 32, 64, 128], slope=lambda w: -2.0), n_boot=100,
                     target={"width": 256, "train_rows": None})["transfer"]["target"]
    assert abs(steep["depth_to_plan_for"] - 32) <= 3


def _size_fit(k: float, plan: int, plan_ci: list[int], s: float = -1.0) -> dict:
    """A per-size fit block with only the fields the carry reads (values invented for the test)."""
    return {"n_runs": 24, "depths_swept": [2, 4, 8, 16, 20],
            "reversal": {"status": "observed", "depth": k, "depth_ci": [k * 0.92, k * 1.08]},
            "power_law": {"slope": s, "slope_ci": [s - 0.05, s + 0.05]},
            "planning": {"recommended_depth": plan, "recommended_basis": "compute-optimal depth (flops)",
                         "compute_optimal_depth": {"depth": plan, "ci": plan_ci},
                         "last_depth_worth_adding": {"depth": 12, "ci": [11, 13]}}}


def test_loose_per_size_plans_give_a_range_not_a_depth_and_deep_carries_are_flagged():
    # Each size's compute-optimal depth is loose (a flat total compute), as in our demo scenario.
    fits = {(16, 0): _size_fit(7.7, 7, [4, 8]), (24, 0): _size_fit(10.1, 5, [4, 9]),
            (32, 0): _size_fit(10.8, 6, [5, 10])}
    tg = fit_transfer(fits, target={"width": 128, "train_rows": None}, n_boot=200)["target"]
    assert tg["plan_settled"] is False
    lo, hi = tg["depth_to_plan_for_range"]
    assert hi - lo > max(4, tg["depth_to_plan_for"])
    assert any("not pinned down" in n for n in tg["notes"])
    assert tg["reversal_depth"] > 20 and tg["deepest_swept_depth"] == 20 and tg["past_swept_depths"] is True
    assert any("past the deepest depth the proxies swept (20)" in n for n in tg["notes"])


def test_far_targets_carry_a_strong_warning():
    fit = fit_runs(sweep([16, 32, 64]), n_boot=60, target={"width": 1024, "train_rows": None})
    assert fit["transfer"]["target"]["extrapolation_factor"]["width"] == 16.0
    assert any(w.startswith("transfer to the target: STRONG WARNING") for w in fit["warnings"])


def test_one_size_or_a_smaller_target_is_refused():
    with pytest.raises(ConfigError, match="one proxy size only"):
        fit_runs(sweep([32]), n_boot=40, target={"width": 256, "train_rows": None})
    with pytest.raises(ConfigError, match="smaller than every proxy"):
        fit_runs(sweep([16, 32]), n_boot=40, target={"width": 8, "train_rows": None})
    assert "transfer" not in fit_runs(sweep([32]), n_boot=40)          # one size, no target: as before


def test_cli_target_options(tmp_path):
    path = tmp_path / "w.csv"
    write_runs_csv(sweep([16, 32, 64]), path)
    ok = subprocess.run([sys.executable, "-m", "depthplan", "fit", str(path), "--target-width", "128",
                         "--bootstrap", "60"], capture_output=True, text=True)
    assert ok.returncode == 0, ok.stderr
    assert "Target (width 128; 2.0x the largest proxy's width): plan for" in ok.stdout
    for bad, says in ((["--target-width", "0"], "argument --target-width: must be a whole number >= 1"),
                      (["--target-width", "4"], "target width 4 is smaller than every proxy")):
        proc = subprocess.run([sys.executable, "-m", "depthplan", "fit", str(path), *bad], capture_output=True, text=True)
        assert proc.returncode == 2 and says in proc.stderr and proc.stderr.count("\n") == 1
