"""The report's tables and later sections (depthplan.reporting.tables): rate groups, tuning
trials, the timing note, warnings and provenance.

Inputs: the invented reports of conftest.py and small hand-made fits; outside references
(hashlib's SHA-256, worked examples computed by hand, fit.json's own rows recomputed here) are
named beside each check.
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path
from types import SimpleNamespace


from depthplan.fit_record import FitResult
from depthplan.fitting.inputs import load_runs
from depthplan.reporting.inputs import ReportInputs
from depthplan.reporting.markup import Words, to_markdown
from depthplan.reporting.tables import (
    provenance_blocks,
    rate_blocks,
    timing_note,
    tuning_blocks,
    warning_blocks,
)

from fitting_data import run
from report_data import page


def _inputs(fit: dict, path: Path = Path("t.csv"), runs=(), **kw) -> ReportInputs:
    return ReportInputs(path=path, kind="table", fit=fit, fit_note="fitted now", runs=list(runs), **kw)


# ------------------------------------------------------------------ in a written report

def test_rate_groups_tuning_and_rounds_are_shown(rates_report):
    folder, paths = rates_report
    fit = json.loads(paths["fit"].read_text())
    assert len(fit["by_learning_rate"]) == 3 and fit["lr_interaction"]["lr_exponent"] is not None
    names = {f.stem for f in paths["figures"]}
    assert {"scaling", "rates", "tuning", "dynamics", "loss"} <= names
    text = "".join(page(paths).text)
    assert "depth partly acts as a learning-rate multiplier" in text
    assert "fixed rate 0.02" in text and "rate tuned per depth" in text
    assert "round 2: reversal interval narrow enough" in text
    assert "Tuning trials" in text
    # the headline and the per-depth table follow the tuned rate (records.primary_group)
    assert fit["group"]["lr_mode"] == "tuned"
    assert "the answer at the top is for the rate tuned per depth" in text
    assert "the answer at the top uses the tuned rate" in text


# ------------------------------------------------------------------ the functions on their own

def test_each_fixed_rate_group_gets_its_fold_of_t_lr_k_recomputed_from_its_rows(rates_report):
    # the invented fixed-rate runs follow T = 14000 / K (x 0.02 / lr) up to K = 10, so T lr K is
    # constant there by construction (report_data.write_rates_folder): both groups must read level
    _, paths = rates_report
    fit = json.loads(paths["fit"].read_text())
    text = " ".join(b[1] for b in rate_blocks(_inputs(fit), Words(fit)) if b[0] == "p")
    fixed = [g for g in fit["by_learning_rate"] if g["group"]["lr_mode"] == "fixed"]
    assert len(fixed) == 2
    for g in fixed:
        used = g["power_law"]["depths_used"]
        assert used[-1] <= 10
        median = {r["depth"]: r["median"] for r in g["per_depth"]}
        first, last = median[used[0]], median[used[-1]]      # None where most runs were censored
        # T lr K at the deepest depth of the law over the shallowest; the rate cancels
        fold = None if first is None or last is None else last * used[-1] / (first * used[0])
        change = "stays about level" + ("" if fold is None else f" ({fold:.2f}-fold from end to end)")
        assert (f"At the fixed rate {g['group']['learning_rate']:g}, T·lr·K {change} over K = "
                f"{used[0]} to {used[-1]}") in text
    assert "acts like a learning-rate multiplier here" in text


def _timed_fit(basis: str, ms_at_4: float) -> FitResult:
    return FitResult.from_dict({
        "planning": {"compute_optimal_depth": {"cost_model": {
            "basis": basis, "seconds_intercept": 1e-3, "seconds_per_layer": 1e-3}}},
        "per_depth": [{"depth": 1, "seconds_per_update": 2e-3}, {"depth": 2, "seconds_per_update": 3e-3},
                      {"depth": 4, "seconds_per_update": ms_at_4 * 1e-3}]})


def test_timing_note_flags_a_depth_more_than_twice_off_the_cost_line():
    # worked by hand: the line 1 ms + 1 ms per layer gives 5 ms at K = 4; 20 ms is 4x that
    note = timing_note(_timed_fit("seconds", 20.0))
    assert "at K = 4: 20 ms against 5 ms on the line" in note and "quiet machine" in note
    assert timing_note(_timed_fit("seconds", 9.0)) == ""          # 1.8x: within a factor 2
    assert timing_note(_timed_fit("flops", 20.0)) == ""           # the FLOP basis uses no timings
    w = Words({})
    fit = _timed_fit("seconds", 20.0)
    blocks = warning_blocks(_inputs(fit.to_dict()), w)
    assert blocks[1][0] == "ul" and blocks[1][1] == [note[0].upper() + note[1:] + "."]
    plain = {"planning": {"compute_optimal_depth": {"cost_model": None}}, "per_depth": []}
    quiet = warning_blocks(_inputs({**plain, "warnings": ["only 4 depths swept."]}), w)
    assert quiet[1] == ("ul", ["Only 4 depths swept."])
    assert warning_blocks(_inputs(plain), w)[1] == ("p", "Neither the fit nor the report raised a warning.")


TRIALS = [{"depth": 1, "learning_rate": 0.0011, "objective": 1500.0},
          {"depth": 1, "learning_rate": 0.01, "objective": 2600.0},
          {"depth": 2, "learning_rate": 0.03, "objective": 1234.4},
          {"depth": 2, "learning_rate": 0.3, "objective": 2000.0},
          {"depth": 4, "learning_rate": 0.6, "objective": 900.0}]


def test_tuning_rows_say_when_the_rate_sits_at_the_edge_of_the_search():
    # worked by hand on the log scale of the range 0.001 to 1 (ln 1000 = 6.908):
    # K = 1 used 0.0011: ln(1.1) / 6.908 = 0.014 (< 0.1, at the edge); K = 2 used 0.03:
    # ln(30) / 6.908 = 0.49 (inside); K = 4 used 0.6: ln(600) / 6.908 = 0.93 (> 0.9, at the edge)
    config = SimpleNamespace(train=SimpleNamespace(tune=SimpleNamespace(low=0.001, high=1.0)))
    runs = [run(1, 10, lr=0.0011, lr_mode="tuned"), run(2, 10, lr=0.03, lr_mode="tuned")]
    (kind, header, rows, cls), = tuning_blocks(_inputs({}, runs=runs, config=config, tuning=TRIALS))
    assert header[-1] == "at the edge of the range"
    assert rows == [["1", "2", "0.0011", "1,500", "0.0011 to 0.01", "yes: widen the range"],
                    ["2", "2", "0.03", "1,234", "0.03 to 0.3", "no"],
                    ["4", "1", "0.6", "900", "0.6 to 0.6", "yes: widen the range"]]
    # without the search range the edge cannot be judged: the column is left out
    (_, header, rows, _), = tuning_blocks(_inputs({}, runs=runs, tuning=TRIALS))
    assert "at the edge of the range" not in header and all(len(r) == 5 for r in rows)


def test_provenance_names_the_table_with_its_sha256(table_report):
    table, paths = table_report
    fit = json.loads(paths["fit"].read_text())
    inp = _inputs(fit, table, load_runs(table))
    md = to_markdown(provenance_blocks(inp), fit, "t", "figures")
    digest = hashlib.sha256(table.read_bytes()).hexdigest()[:16]      # reference: hashlib
    assert f"`{table.name}`, {len(inp.runs)} records, sha256 {digest}…" in md
    assert f"bootstrap seed {fit['bootstrap']['seed']}, schema {fit['schema']}" in md
    assert "| CPU of this report |" in md and "the machine that trained is not recorded" not in md
