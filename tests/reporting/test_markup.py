"""Blocks to Markdown and to self-contained HTML (depthplan.reporting.markup).

Outside references: the HTML and CSS specifications named beside each check, the PNG
specification (the IHDR chunk holds the pixel size, read back here with matplotlib.image.imread),
and Python's own format() mini-language for the number formats. Fit values are invented.
"""
from __future__ import annotations

import base64
import io

import matplotlib.image as mpimg
import pytest
from matplotlib.figure import Figure

from depthplan.reporting.markup import (
    EXTRAPOLATED,
    FigureFile,
    Words,
    format_value,
    html_body,
    lookup,
    to_html,
    to_markdown,
)

from report_data import ALL_REPORTS, Page, page

FIT = {"power_law": {"slope": -0.8123, "slope_ci": [-0.9, -0.7], "alpha": 0.552},
       "per_depth": [{"depth": 1, "median": 12000.4}, {"depth": 2, "median": 6900.6}],
       "planning": {"recommended_depth": 6, "save_fraction": 0.05, "flag": True, "half_ci": [1, None]}}


# ------------------------------------------------------------------ a written report

@pytest.mark.parametrize("report", ALL_REPORTS)
def test_html_is_self_contained(report, request):
    _, paths = request.getfixturevalue(report)
    p = page(paths)
    # HTML: a data: URI needs no fetch (RFC 2397); a fragment link (#id) stays in the page (RFC 3986 4.4)
    for tag, attrs in p.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed", "base"), tag
        for name in ("src", "href", "srcset", "poster", "data", "action", "formaction", "xlink:href"):
            if name in attrs:
                assert attrs[name].startswith(("data:", "#")), (tag, name, attrs[name][:80])
    css = "".join(p.styles)
    # CSS: url() and @import are the only ways a style sheet fetches (CSS 2.1, sections 4.3.4, 6.3)
    assert "url(" not in css and "@import" not in css
    csp = [a["content"] for t, a in p.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0]


# ------------------------------------------------------------------ number references

def test_lookup_follows_dotted_paths_and_gives_none_when_absent():
    assert lookup(FIT, "power_law.slope") == -0.8123
    assert lookup(FIT, "per_depth.1.median") == 6900.6
    assert lookup(FIT, "power_law.slope_ci.-1") == -0.7          # negative index, as Python's list
    for absent in ("power_law.missing", "per_depth.2.median", "per_depth.-3.median",
                   "per_depth.x", "power_law.slope.0"):
        assert lookup(FIT, absent) is None, absent


@pytest.mark.parametrize("value, fmt, shown", [
    (-0.8123, ".2f", "-0.81"),
    (0.05, "g@100", "5"),            # the factor after '@' multiplies first: 0.05 x 100 = 5
    (0.0123, ".3g@1e3", "12.3"),
    (-213000.0, ".3g@-1e-6", "0.213"),  # a negative factor shows a negative amount as "less x"
    (6.5, "d", "6"),                 # round half to even (Python's round), then the 'd' format
    (7.5, "d", "8"),
    (12000.4, ",.0f", "12,000"),
    (None, ".2f", "n/a"),
    ([1, 2], ".2f", "n/a"),
    (True, "d", "True"),
    ("observed", ".2f", "observed"),
])
def test_format_value_worked_examples(value, fmt, shown):
    # reference: Python's format() mini-language (format(6.0, "d") is refused, hence the rounding)
    assert format_value(value, fmt) == shown


def test_words_make_references_and_intervals_only_when_both_ends_are_there():
    w = Words(FIT)
    assert w.num("power_law.slope") == "⟦power_law.slope|.2f⟧"
    assert w.interval("power_law.slope_ci") == "⟦power_law.slope_ci.0|.2f⟧ to ⟦power_law.slope_ci.1|.2f⟧"
    assert w.ci("power_law.slope_ci", ".1f").startswith(" (95 % interval ⟦power_law.slope_ci.0|.1f⟧")
    assert w.interval("planning.half_ci") == "" and w.ci("power_law.alpha") == ""
    group = Words(FIT, "per_depth.1.")
    assert group.get("median") == 6900.6 and group.num("median", "d") == "⟦per_depth.1.median|d⟧"


# ------------------------------------------------------------------ the two renderings

BLOCKS = [("h", 2, "The answer", "answer"),
          ("p", f"**Plan for {Words(FIT).num('planning.recommended_depth', 'd')} layers**{EXTRAPOLATED}.",
           "answer lead"),
          ("p", "T ∝ K^{-0.81}; see `fit.json` & <this>", "small"),
          ("ul", ["one", "two"]),
          ("table", ["K", "T | median"], [["1", "⟦per_depth.0.median|,.0f⟧"]], "numbers"),
          ("pre", "The config", "name: x\n")]


def test_markdown_rendering_of_each_kind_of_block():
    md = to_markdown(BLOCKS, FIT, "Depth plan", "figures")
    assert md.startswith("# Depth plan\n\n## The answer\n\n")
    assert "> **Plan for 6 layers** [extrapolated]." in md            # an answer box is a quote
    assert "T ∝ K^-0.81; see `fit.json` & <this>" in md               # not boxed, text kept as is
    assert "- one\n- two" in md
    # a '|' inside a cell is escaped (GitHub Flavored Markdown spec, tables extension);
    # a "numbers" table right-aligns all but its first column
    assert "| K | T \\| median |\n|---|---:|\n| 1 | 12,000 |" in md
    assert "**The config**\n\n```\nname: x\n```" in md and md.endswith("\n") and not md.endswith("\n\n")


def test_html_rendering_tags_numbers_and_escapes_text():
    body = html_body(BLOCKS, FIT)
    assert '<h2 id="answer">The answer</h2>' in body
    assert ('<p class="answer lead"><strong>Plan for <span class="num" data-key="planning.recommended_depth" '
            'data-fmt="d">6</span> layers</strong><span class="badge">extrapolated</span>.</p>') in body
    # text is escaped (HTML 5, section 13.1.2.6: '<' and '&' in text), then marked up
    assert "T ∝ K<sup>-0.81</sup>; see <code>fit.json</code> &amp; &lt;this&gt;" in body
    assert '<table class="numbers"><thead><tr><th>K</th><th>T | median</th></tr></thead>' in body
    assert "<details><summary>The config</summary><pre>name: x\n</pre></details>" in body
    spans = Page(body).numbers
    assert spans == [("planning.recommended_depth", "d", "6"), ("per_depth.0.median", ",.0f", "12,000")]


def test_a_figure_is_embedded_at_two_thirds_of_its_pixel_size(tmp_path):
    fig = Figure(figsize=(3, 1.5), dpi=90)
    fig.subplots().plot([1, 2], [2, 1])
    png, svg = tmp_path / "f.png", tmp_path / "f.svg"
    fig.savefig(png)
    svg.write_text("<svg/>")
    height, width = mpimg.imread(png).shape[:2]                      # reference reader: matplotlib
    assert (width, height) == (270, 135)                             # 3 x 90 by 1.5 x 90 pixels
    f = FigureFile(name="law", title="The law", caption="K^{2} caption", alt="alt <text>", png=png, svg=svg)
    html = to_html([("h", 2, "Figures", "figs"), ("fig", f), ("fig", f)], FIT, "T & K")
    assert f'width="{width * 2 // 3}" height="{height * 2 // 3}"' in html
    assert "<strong>Figure 2. The law.</strong> K<sup>2</sup> caption" in html   # numbered in order
    src = Page(html).tags
    imgs = [a for t, a in src if t == "img"]
    assert len(imgs) == 2 and imgs[0]["alt"] == "alt <text>"
    assert base64.b64decode(imgs[0]["src"].split(",", 1)[1]) == png.read_bytes()
    assert mpimg.imread(io.BytesIO(base64.b64decode(imgs[0]["src"].split(",", 1)[1]))).shape[:2] == (135, 270)
    assert "<title>T &amp; K</title>" in html and '<nav><a href="#figs">Figures</a></nav>' in html
    md = to_markdown([("fig", f)], FIT, "t", "figures")
    assert "![alt <text>](figures/f.png)" in md and "*Figure 1. The law.* K^2 caption" in md
