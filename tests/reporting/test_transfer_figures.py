"""The figure of the carry along proxy size (depthplan.reporting.transfer_figures).

Input: the invented sweep over widths of conftest.py's `transfer_report` (fitting_data.sweep,
K*(W) = 2 W^0.5, widths 16, 32, 64 in the fit, 128 held out, target 256). Every point drawn is
checked against the number fit.json's `transfer` block holds for it.
"""
from __future__ import annotations

import json

import pytest
from matplotlib.container import ErrorbarContainer
from matplotlib.figure import Figure

from depthplan.fit_record import FitResult
from depthplan.reporting.transfer_figures import has_transfer_figure, plot_transfer_panel


@pytest.fixture(scope="module")
def transfer_fit(transfer_report) -> dict:
    return json.loads(transfer_report["fit"].read_text())


def _points(artist: ErrorbarContainer) -> list[float]:
    """x1, y1, x2, y2, ... of an error bar's data points."""
    line = artist.lines[0]
    return [float(v) for xy in zip(line.get_xdata(), line.get_ydata()) for v in xy]


@pytest.mark.parametrize("quantity", ["reversal_depth", "slope"])
def test_each_point_of_the_panel_is_fit_json_s_number(transfer_fit, quantity):
    t = transfer_fit["transfer"]
    ax = Figure().subplots()
    drawn = plot_transfer_panel(FitResult.from_dict(transfer_fit), ax, quantity)
    by_label: dict[str, list] = {}
    for a in drawn:
        by_label.setdefault(a.get_label(), []).append(a)
    sizes = [a for a in drawn if isinstance(a, ErrorbarContainer) and a.lines[0].get_marker() == "o"]
    assert [p for a in sizes for p in _points(a)] == pytest.approx(
        [v for s in t["sizes"] for v in (s["width"], s[quantity])])
    v = t["verify"]
    # the held-out width: predicted drawn just left of it, measured just right (x 1/1.04 and x 1.04)
    (pred,), (meas,) = (by_label["held-out size: predicted before it trained"],
                        by_label["held-out size: measured"])
    assert _points(pred) == pytest.approx([v["width"] / 1.04, v["predicted"][quantity]])
    assert _points(meas) == pytest.approx([v["width"] * 1.04, v["measured"][quantity]])
    (target_line,) = by_label["target job"]
    assert list(target_line.get_xdata()) == [256, 256]
    (target,) = by_label["target: carried along size (95 % interval)"]
    assert _points(target) == pytest.approx([256, t["target"][quantity]])
    # right of the largest proxy in the fit (64) lies the hatched field of extrapolation
    (beyond,) = by_label["beyond the largest proxy fitted (extrapolated)"]
    assert t["curve"]["largest_proxy"] == 64
    assert beyond.get_x() == pytest.approx(64)
    assert ax.get_yscale() == ("log" if quantity == "reversal_depth" else "linear")
    assert ax.get_xscale() == "log" and ax.get_xlabel() == "proxy hidden width W"


def test_a_fit_without_a_size_trend_has_no_transfer_figure(transfer_fit):
    assert has_transfer_figure(FitResult.from_dict(transfer_fit))
    assert not has_transfer_figure(FitResult.from_dict({"power_law": {"slope": -1.0}}))
    assert not has_transfer_figure(FitResult.from_dict({"transfer": {"status": "single_size", "curve": None}}))
