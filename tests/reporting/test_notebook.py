"""A fit's view in a notebook cell (depthplan.reporting.notebook.fit_html, shown by
`depthplan.fit(...)._repr_html_()`, the method IPython's rich display calls).

Input: an invented table of ten jobs (the one tests/test_api.py fits). Every number shown is
checked against the fit's own value, read apart from the report's lookup (report_data.value_at).
"""
from __future__ import annotations

import pytest

import depthplan
from depthplan.reporting.notebook import fit_html

from report_data import Page, expected_text, value_at

TABLE = {"depth": [2, 2, 4, 4, 8, 8, 16, 16, 32, 32],
         "iterations": [6100, 5900, 3900, 4050, 2600, 2500, 1650, 1700, 1100, 1080],
         "seed": [0, 1] * 5}


@pytest.fixture(scope="module")
def result():
    return depthplan.fit(TABLE, bootstrap=100)


def test_notebook_view_holds_the_answer_and_nothing_external(result):
    r = result
    view = r._repr_html_()
    assert f"Plan for <span class=\"num\" data-key=\"planning.recommended_depth\" data-fmt=\"d\">" \
           f"{r.planning.recommended_depth}</span> hidden layers" in view
    assert "slope s of log T on log K" in view                         # the fit table
    for external in ("<script", "<link", "src=", "http://", "https://", "@import", "url("):
        assert external not in view


def test_every_number_in_the_view_is_the_fit_s_and_the_view_is_one_scoped_fragment(result):
    view = fit_html(result)
    assert view == result._repr_html_()
    fit = result.to_dict()
    numbers = Page(view).numbers
    assert len(numbers) > 10
    for key, fmt, shown in numbers:
        assert shown == expected_text(value_at(fit, key), fmt), key
    assert {"power_law.slope", "power_law.slope_ci.0", "planning.recommended_depth"} <= {k for k, _, _ in numbers}
    # one <div> holding its own style, every rule scoped to it; the answer, the table, the warnings
    assert view.startswith('<div class="depthplan-fit"><style>') and view.endswith("</div>")
    style = view.split("<style>", 1)[1].split("</style>", 1)[0]
    rules = [r.split("{", 1)[0] for r in style.split("}") if "{" in r]
    assert rules and all(sel.strip().startswith(".depthplan-fit") for rule in rules for sel in rule.split(","))
    assert '<h2 id="answer">The answer</h2>' in view and '<h2 id="warnings">Warnings</h2>' in view
    assert "<img" not in view and "<figure" not in view
