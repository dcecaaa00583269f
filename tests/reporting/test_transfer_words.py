"""The report's words on a sweep over proxy sizes (depthplan.reporting.transfer_words): the held-out
check leads, the target's depth beside the proxy-only answer, the section "From proxies to the target".

Input: a results folder of invented runs (the broken-stick generator fitting_data.sweep,
K*(W) = 2 W^0.5) at widths 16, 32, 64 and a held-out 128, with a sweep.json naming the held-out width
and a target width (the `transfer_report` fixture of conftest.py). The numbers shown are checked
against fit.json through the HTML's data-key tags.
"""
from __future__ import annotations

import json
from pathlib import Path

from depthplan.fit_record import FitResult
from depthplan.fitting.inputs import load_runs
from depthplan.reporting.inputs import ReportInputs
from depthplan.reporting.markup import Words
from depthplan.reporting.transfer_words import headline_runs, lead_blocks, section_blocks

from report_data import expected_text, page, value_at


def test_the_answer_leads_with_the_held_out_check_then_the_target(transfer_report):
    md = transfer_report["md"].read_text(encoding="utf-8")
    fit = json.loads(transfer_report["fit"].read_text())
    t = fit["transfer"]
    answer = md.split("## The answer", 1)[1]
    check, target, proxy = (answer.index("**Held-out check (width 128).**"),
                            answer.index("**For the target job (width 256; 4.0x the largest proxy's width):**"),
                            answer.index("**Plan for"))
    assert check < target < proxy                                        # backtest first, proxy-only answer kept
    assert "the carry along size held once" in answer[:target]
    assert f"plan for **{t['target']['depth_to_plan_for']} hidden layers**" in md
    assert "## From proxies to the target" in md and "(figures/transfer.png)" in md
    assert any(p.name == "transfer.png" for p in transfer_report["figures"])


def test_transfer_numbers_in_the_text_equal_fit_json(transfer_report):
    fit = json.loads(transfer_report["fit"].read_text())
    numbers = page(transfer_report).numbers
    for key, fmt, shown in numbers:
        assert shown == expected_text(value_at(fit, key), fmt), key
    keys = {k for k, _, _ in numbers}
    assert {"transfer.verify.predicted.reversal_depth", "transfer.verify.measured.reversal_depth",
            "transfer.target.depth_to_plan_for", "transfer.target.reversal_depth",
            "transfer.sizes.0.reversal_depth", "transfer.reversal_depth_law.by_axis.width.exponent"} <= keys


# ------------------------------------------------------------------ the functions on their own

def test_the_headline_describes_the_largest_proxy_measured(transfer_report):
    fit = json.loads(transfer_report["fit"].read_text())
    runs = load_runs(transfer_report["fit"].parent)
    chosen = headline_runs(FitResult.from_dict(fit), runs)
    # the widest runs measured are the held-out width 128 (docs/fit-json.md, `headline_size`)
    assert fit["transfer"]["headline_size"]["width"] == max(r.width for r in runs) == 128
    assert {r.width for r in chosen} == {128} and len(chosen) == sum(r.width == 128 for r in runs)
    assert headline_runs(FitResult.from_dict({}), runs) == runs            # without sizes: every run


def test_without_a_transfer_block_there_are_no_transfer_words():
    fit = {"power_law": {"slope": -1.0}}
    inp = ReportInputs(path=Path("t.csv"), kind="table", fit=fit, fit_note="", runs=[])
    assert lead_blocks(inp, Words(fit)) == [] and section_blocks(inp, Words(fit)) == []


def test_the_size_table_has_a_row_per_fitted_size_and_the_held_out_one(transfer_report):
    fit = json.loads(transfer_report["fit"].read_text())
    inp = ReportInputs(path=transfer_report["fit"].parent, kind="results_folder", fit=fit, fit_note="", runs=[])
    table = next(b for b in section_blocks(inp, Words(fit)) if b[0] == "table")
    roles = [(row[0], row[1]) for row in table[2]]
    assert roles == [("width 16", "fit"), ("width 32", "fit"), ("width 64", "fit"), ("width 128", "held out")]
    # the run counts are those of fit.json's sizes (3 seeds x 11 depths each, fitting_data.sweep)
    assert [row[2] for row in table[2][:3]] == [str(s["n_runs"]) for s in fit["transfer"]["sizes"]] == ["33"] * 3
