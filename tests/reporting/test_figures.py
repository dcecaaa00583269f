"""The depth-law figures and the shared figure helpers (depthplan.reporting.figures).

Inputs: the invented reports of conftest.py (their fit.json and runs) and tiny hand-made values.
Outside references: the PNG and SVG specifications (file signature, root element), matplotlib's
own cividis colour map, and counts of runs taken straight from the inputs.
"""
from __future__ import annotations

import json
import xml.etree.ElementTree as ET

from matplotlib import colormaps
from matplotlib.figure import Figure

from depthplan.fit_record import FitGroup, FitResult, GroupLabel
from depthplan.fitting.inputs import load_runs
from depthplan.reporting.figures import (
    extrapolated_depths,
    group_label,
    labelled,
    log_axis_numbers,
    new_figure,
    ordered_colour,
    plot_scaling,
    save_figure,
    shared_legend,
)

from report_data import PNG_SIGNATURE, SVG_NS


# ------------------------------------------------------------------ in a written report

def test_scaling_plot_draws_censored_and_diverged_runs_as_such(rates_report):
    folder, paths = rates_report
    fit = json.loads(paths["fit"].read_text())
    group = fit["by_learning_rate"][0]
    assert group["group"]["learning_rate"] == 0.02
    runs = load_runs(folder)
    ax = Figure().subplots()
    group = FitGroup.from_dict(group)
    drawn = {a.get_label(): a for a in plot_scaling(group, runs, ax, groups=[group])}
    at = [r for r in runs if r.lr_mode == "fixed" and r.learning_rate == 0.02]
    n_cens = sum(r.status == "censored" for r in at)
    n_div = sum(r.status == "diverged" for r in at)
    assert n_cens == 3 and n_div == 1
    assert len(drawn["censored run: T ≥ budget"].get_offsets()) == n_cens
    assert len(drawn["diverged run (no T)"].get_offsets()) == n_div
    assert len(drawn["one run (seed)"].get_offsets()) == len(at) - n_cens - n_div


# ------------------------------------------------------------------ the functions on their own

def test_scaling_plot_shades_and_marks_what_lies_beyond_the_swept_depths(table_report):
    table, paths = table_report
    fit = FitResult.from_dict(json.loads(paths["fit"].read_text()))
    worth = fit.planning.last_depth_worth_adding
    assert worth.extrapolated and worth.depth > max(fit.depths_swept)     # the table plans past K = 8
    assert worth.depth in extrapolated_depths(fit)
    ax = Figure().subplots()
    labels = [a.get_label() for a in plot_scaling(fit, load_runs(table), ax)]
    assert "beyond the swept depths: not measured" in labels
    assert f"last depth worth adding: K = {worth.depth} (extrapolated)" in labels
    assert ax.get_xlim()[1] > max(fit.depths_swept)                      # the axis reaches it
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "beyond the swept depths: not measured" in legend and len(legend) == len(set(legend))


def test_extrapolated_depths_lists_each_planning_depth_outside_the_sweep_once():
    def fit(worth, opt, rec, rec_far):
        return FitResult.from_dict({"planning": {
            "last_depth_worth_adding": {"depth": worth[0], "extrapolated": worth[1]},
            "compute_optimal_depth": {"depth": opt[0], "extrapolated": opt[1]},
            "recommended_depth": rec, "recommended_extrapolated": rec_far}})
    assert extrapolated_depths(fit((20, True), (6, False), 20, True)) == [20]
    assert extrapolated_depths(fit((20, True), (24, True), 20, True)) == [20, 24]
    assert extrapolated_depths(fit((None, False), (6, False), 6, False)) == []


def test_group_labels_and_ordered_colours():
    assert group_label(None) == "all runs"
    assert group_label(GroupLabel.from_dict({"lr_mode": "tuned", "learning_rate": None})) == "rate tuned per depth"
    assert group_label(GroupLabel.from_dict({"lr_mode": "fixed", "learning_rate": 0.02})) == "fixed rate 0.02"
    assert group_label(GroupLabel.from_dict({"lr_mode": "fixed", "learning_rate": None})) == "rate not recorded"
    # reference: matplotlib's cividis map; the series spans 0 to 0.8 of it (the palest end left out)
    cividis = colormaps["cividis"]
    assert ordered_colour(0, 5) == cividis(0.0) and ordered_colour(4, 5) == cividis(0.8)
    assert ordered_colour(2, 5) == cividis(0.4) and ordered_colour(0, 1) == cividis(0.0)


def test_labelled_keeps_each_label_once_in_drawing_order():
    ax = Figure().subplots()
    a = ax.plot([1], [1], label="first")[0]
    b = ax.plot([1], [2], label="second")[0]
    c = ax.plot([1], [3], label="first")[0]
    d = ax.plot([1], [4], label="_hidden")[0]
    e = ax.plot([1], [5])[0]                       # matplotlib names an unlabelled line "_child..."
    assert labelled([a, b, c, d, e]) == [a, b]


def _two_panels():
    fig, axes = new_figure(4, 2, n_cols=2, n_rows=1)
    axes[0].plot([1, 10, 100], [1, 2, 3], label="a")
    axes[1].plot([1, 10], [3, 4], label="b")
    axes[1].plot([1, 10], [5, 6], label="a")
    for ax in axes:
        ax.set_xscale("log")
        log_axis_numbers(ax.xaxis)
        ax.legend()
    shared_legend(fig, axes)
    return fig, axes


def test_new_figure_save_figure_and_shared_legend(tmp_path):
    fig, axes = _two_panels()
    assert len(axes) == 2 and all(ax.figure is fig for ax in axes)
    fmt = axes[0].xaxis.get_major_formatter()
    assert (fmt(1000, 0), fmt(2, 0), fmt(0.5, 0)) == ("1,000", "2", "0.5")
    assert all(ax.get_legend() is None for ax in axes)
    assert [t.get_text() for t in fig.legends[0].get_texts()] == ["a", "b"]
    png, svg = save_figure(fig, tmp_path / "figs", "two")
    assert (png.name, svg.name) == ("two.png", "two.svg")
    assert png.read_bytes()[:8] == PNG_SIGNATURE and ET.parse(svg).getroot().tag == f"{SVG_NS}svg"
    # the same figure drawn again gives the same bytes (no date or random id in either file), so
    # a report written twice from one fit.json has the same figures
    png2, svg2 = save_figure(_two_panels()[0], tmp_path / "again", "two")
    assert png2.read_bytes() == png.read_bytes() and svg2.read_bytes() == svg.read_bytes()
