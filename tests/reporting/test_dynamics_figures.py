"""Figures of cost, loss curves, probes and learning rates (depthplan.reporting.dynamics_figures).

Inputs: tiny invented runs and fits built by hand, and the invented reports of conftest.py. The
values drawn are checked against worked examples computed by hand, numpy's median, a closed form
of the total cost, and fit.json's own rows.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from matplotlib.container import ErrorbarContainer
from matplotlib.figure import Figure

from depthplan.fit_record import FitResult
from depthplan.reporting.dynamics_figures import (
    cost_words,
    has_depth_dynamics,
    has_timings,
    layer_medians,
    plot_rate_product,
    plot_snr_drop_by_depth,
    plot_total_cost,
    plot_tuning,
    representative_runs,
)

from fitting_data import run


def test_cost_words_and_what_counts_as_timings():
    assert cost_words(1e-4, 2e-4) == "0.1 ms + 0.2 ms per layer"
    assert cost_words(0.0, 2.5e-3) == "2.5 ms per layer"
    assert has_timings([run(1, 10, sec=1e-3), run(2, 10, sec=2e-3)])
    assert not has_timings([run(1, 10, sec=1e-3), run(1, 10, sec=2e-3)])            # one depth
    assert not has_timings([run(1, 10, sec=1e-3), run(2, 10, sec=math.nan), run(3, 10, sec=0.0)])


def _curve(depth: int, t: int, status: str = "converged"):
    return run(depth, t, status, eval_steps=(10, 20), train_loss=(1.0, 0.5))


def test_representative_run_is_the_median_t_with_converged_runs_first():
    runs = [_curve(2, 300), _curve(2, 100), _curve(2, 200),              # median of 3: T = 200
            _curve(4, 400), _curve(4, 100), _curve(4, 300), _curve(4, 200),   # 4 runs: the lower middle, 200
            _curve(8, 50, "censored"), _curve(8, 90), _curve(8, 80),    # censored sorts after: 80, 90, 50c
            run(16, 10)]                                                 # no loss curve: left out
    reps = representative_runs(runs)
    assert list(reps) == [2, 4, 8]
    assert [reps[k].iterations for k in (2, 4, 8)] == [200, 200, 90]


def test_layer_medians_match_probe_steps_by_value_and_keep_steps_half_the_runs_reached():
    # three invented runs stopping at T = 8, 6 and 4 on the grid 1, 2, 4 (each adds its own T)
    def probed(t_steps, layer0, layer1):
        return run(2, t_steps[-1], probe_steps=t_steps, displacement=(layer0, layer1))
    runs = [probed((1, 2, 4, 8), (1.0, 2.0, 3.0, 4.0), (10.0, 20.0, 30.0, 40.0)),
            probed((1, 2, 4, 6), (3.0, 4.0, 5.0, 6.0), (30.0, 40.0, 50.0, 60.0)),
            probed((1, 2, 4), (5.0, math.nan, 7.0), (50.0, 60.0, 70.0))]
    steps, med = layer_medians(runs, "displacement")
    # steps 6 and 8 are reached by one run of three (under half): dropped
    assert steps.tolist() == [1.0, 2.0, 4.0] and med.shape == (2, 3)
    assert med[0].tolist() == [np.median([1, 3, 5]), np.median([2, 4, -np.inf]), np.median([3, 5, 7])]
    assert med[1].tolist() == [30.0, 40.0, 50.0]
    # a run that reached a step but could not measure it pulls the median down (here from 4 to 2,
    # the median of 2, 4 and a value below every other); two such runs leave a gap (NaN)
    runs[0] = probed((1, 2, 4, 8), (1.0, math.nan, 3.0, 4.0), (10.0, 20.0, 30.0, 40.0))
    _, med = layer_medians(runs, "displacement")
    assert math.isnan(med[0][1])
    assert layer_medians([run(1, 10)], "displacement")[0].size == 0


def test_total_cost_panel_draws_updates_times_cost_and_the_compute_optimal_depth():
    # invented law T = 1000 K^-0.5 and cost 8 + K seconds per update: total 1000 K^-0.5 (8 + K)
    k = np.geomspace(1, 16, 40)
    fit = FitResult.from_dict({
        "depths_swept": [1, 2, 4, 8, 16], "per_depth": [],
        "planning": {"compute_optimal_depth": {"depth": 8, "ci": [6, 10], "extrapolated": False,
                                               "cost_model": {"basis": "seconds", "seconds_intercept": 8.0,
                                                              "seconds_per_layer": 1.0}}},
        "curve": {"depths": k.tolist(), "median": (1000 * k ** -0.5).tolist()}})
    runs = [run(4, 500, sec=0.012), run(4, 520, "censored", sec=0.012), run(8, 350, "diverged", sec=0.016)]
    ax = Figure().subplots()
    drawn = {a.get_label(): a for a in plot_total_cost(fit, runs, ax)}
    assert drawn["one run (seed)"].get_offsets().tolist() == [[4.0, 500 * 0.012]]
    assert drawn["censored run: at least this"].get_offsets().tolist() == [[4.0, 520 * 0.012]]
    line = drawn["fitted T(K) × fitted seconds per update"]
    assert line.get_ydata() == pytest.approx(1000 * k ** -0.5 * (8 + k), rel=1e-12)
    assert list(drawn["compute-optimal K = 8 [6, 10]"].get_xdata()) == [8, 8]


def test_tuning_panel_fills_the_best_trial_of_each_depth():
    rows = [{"depth": 1, "learning_rate": 0.1, "objective": 900.0},
            {"depth": 1, "learning_rate": 0.01, "objective": 1500.0},
            {"depth": 1, "learning_rate": 1.0, "objective": 700.0},
            {"depth": 4, "learning_rate": 0.05, "objective": 400.0},
            {"depth": 4, "learning_rate": 0.5, "objective": 650.0}]
    ax = Figure().subplots()
    drawn = plot_tuning(rows, ax)
    lines = [a for a in drawn if hasattr(a, "get_xdata")]
    assert [list(line.get_xdata()) for line in lines] == [[0.01, 0.1, 1.0], [0.05, 0.5]]   # sorted by rate
    best = [a.get_offsets().tolist() for a in drawn
            if not hasattr(a, "get_xdata") and not a.get_label().startswith("K =")]
    assert best == [[[1.0, 700.0]], [[0.05, 400.0]]]
    assert [t.get_text() for t in ax.get_legend().get_texts()] == ["K = 1", "K = 4"]


def test_rate_product_panel_plots_median_t_lr_k_of_each_fixed_rate(rates_report):
    _, paths = rates_report
    fit = json.loads(paths["fit"].read_text())
    ax = Figure().subplots()
    drawn = plot_rate_product(FitResult.from_dict(fit), [], ax)
    fixed = [g for g in fit["by_learning_rate"] if g["group"]["lr_mode"] == "fixed"]
    assert [a.get_label() for a in drawn] == [f"fixed rate {g['group']['learning_rate']:g}" for g in fixed]
    for line, g in zip(drawn, fixed):
        rows = [r for r in g["per_depth"] if r["median"] is not None]
        lr = g["group"]["learning_rate"]
        assert list(line.get_xdata()) == [r["depth"] for r in rows]
        assert line.get_ydata() == pytest.approx([r["median"] * lr * r["depth"] for r in rows])


def test_snr_drop_panel_draws_fit_json_s_per_depth_rows(folder_report):
    _, paths = folder_report
    fit = json.loads(paths["fit"].read_text())
    assert has_depth_dynamics(FitResult.from_dict(fit))
    assert not has_depth_dynamics(FitResult.from_dict({"diffusion": {"by_depth": []}}))
    ax = Figure().subplots()
    drawn = plot_snr_drop_by_depth(FitResult.from_dict(fit), ax)
    (bars,) = [a for a in drawn if isinstance(a, ErrorbarContainer)]
    rows = [r for r in fit["diffusion"]["by_depth"] if r["snr_drop_db"] is not None]
    assert list(bars.lines[0].get_xdata()) == [r["depth"] for r in rows]
    assert list(bars.lines[0].get_ydata()) == pytest.approx([r["snr_drop_db"] for r in rows])
    assert any(a.get_label() == "2 dB: under it, no drop" for a in drawn)
