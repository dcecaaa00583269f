"""The report of a sweep over proxy sizes: the held-out check leads, the target's depth beside the
proxy-only answer, the section "From proxies to the target" with its figure.

Input: a results folder of invented runs (the broken-stick generator of tests/fitting/test_transfer,
K*(W) = 2 W^0.5) at widths 16, 32, 64 and a held-out 128, with a sweep.json naming the held-out width
and a target width. The numbers shown are checked against fit.json through the HTML's data-key tags.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from depthplan.records import write_runs_csv
from depthplan.reporting.write import write_report

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "fitting"))
from test_transfer import sweep  # noqa: E402
from test_write import expected_text, page, value_at  # noqa: E402


@pytest.fixture(scope="module")
def transfer_report(tmp_path_factory):
    folder = tmp_path_factory.mktemp("sized")
    write_runs_csv(sweep([16, 32, 64]) + sweep([128], seed=9), folder / "runs.csv")
    (folder / "sweep.json").write_text(json.dumps({
        "name": "sized", "eval_every": 20, "max_updates": 40000,
        "verify": {"width": 128, "train_rows": None, "prediction": None},
        "target": {"width": 256, "train_rows": None, "n_params": None}}))
    return write_report(folder, n_boot=60)


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
