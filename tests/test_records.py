"""Records that cross module lines (records.py): the enums, the learning-rate curve rule, cell ids,
and the runs.csv / runs.jsonl writers, read back with Python's csv and json modules."""
from __future__ import annotations

import csv
import json
import math
import os

import pytest

from depthplan.records import (RUN_COLUMNS, CellSpec, RateMode, RunResult, RunStatus, group_runs, primary_group,
                               rate_group, write_bytes_atomic, write_runs_csv, write_runs_jsonl, write_text_atomic)


def _run(**kw) -> RunResult:
    base = dict(depth=2, width=8, seed=0, learning_rate=0.1, status="converged", iterations=50, wall_seconds=1.0,
                seconds_per_update=0.01, final_train_loss=0.5, final_train_accuracy=0.5,
                validation_accuracy=0.5, n_params=10)
    return RunResult(**{**base, **kw})


def test_run_status_and_rate_mode_are_enums_that_store_as_today_s_strings():
    # runs.csv and runs.jsonl keep the strings (docs/fit-json.md); the objects carry the enums
    r = RunResult(depth=2, width=8, seed=0, learning_rate=0.1, status="censored", iterations=50,
                  wall_seconds=1.0, seconds_per_update=0.01, final_train_loss=0.5,
                  final_train_accuracy=0.5, validation_accuracy=0.5, n_params=10, lr_mode="tuned")
    assert r.status is RunStatus.CENSORED and r.lr_mode is RateMode.TUNED
    d = r.to_dict()
    assert type(d["status"]) is str and d["status"] == "censored" and r.row()["lr_mode"] == "tuned"
    assert RunResult.from_dict(json.loads(json.dumps(d))) == r
    odd = RunResult.from_dict({**d, "status": "failed"})     # a value another version wrote
    assert odd.status == "failed" and not isinstance(odd.status, RunStatus)


def test_the_enums_print_as_their_values() -> None:
    assert str(RunStatus.DIVERGED) == "diverged" and f"{RateMode.FIXED:>7}" == "  fixed"
    assert f"K{2}-{RateMode.TUNED}" == "K2-tuned"


# --------------------------------------------------------------------------- the learning-rate curve rule

def test_rates_equal_to_12_significant_digits_are_one_curve() -> None:
    # 0.1 + 0.2 is 0.30000000000000004 in binary floating point (IEEE 754); read back from CSV text
    # "0.3" it must land on the same curve
    assert rate_group(_run(learning_rate=0.1 + 0.2)) == rate_group(_run(learning_rate=float("0.3"))) == ("fixed", 0.3)
    assert rate_group(_run(learning_rate=0.3 + 1e-9)) != rate_group(_run(learning_rate=0.3))
    assert rate_group(_run(lr_mode="tuned", learning_rate=0.7)) == ("tuned", None)
    assert rate_group(_run(learning_rate=math.nan)) == ("fixed", None)


def test_groups_run_in_rising_fixed_rate_then_tuned_and_leave_tuning_trials_out() -> None:
    runs = [_run(learning_rate=0.2), _run(lr_mode="tuned", learning_rate=0.05), _run(learning_rate=0.05),
            _run(lr_mode="tuning", learning_rate=0.9), _run(learning_rate=0.2, seed=1)]
    groups = group_runs(runs)
    assert list(groups) == [("fixed", 0.05), ("fixed", 0.2), ("tuned", None)]
    assert [len(v) for v in groups.values()] == [1, 2, 1]
    assert primary_group(groups) == ("tuned", None)                    # the tuned curve when there is one
    fixed_only = {k: v for k, v in groups.items() if k[0] == "fixed"}
    assert primary_group(fixed_only) == ("fixed", 0.2)                 # else the fixed rate with most runs


# --------------------------------------------------------------------------- cells

def test_cell_ids_and_the_cell_round_trip() -> None:
    plain = CellSpec(depth=3, seeds=(0, 1, 2), learning_rate=0.05)
    assert plain.cell_id == "K3-lr0.05-fixed-s0-1-2"                   # the format stores were made with
    sized = CellSpec(depth=3, seeds=(4,), learning_rate=1 / 3, lr_mode="tuned", width=16, train_rows=500)
    assert sized.cell_id == "W16-N500-K3-lr0.333333-tuned-s4" and sized.lr_mode is RateMode.TUNED
    assert "width" not in plain.to_dict() and sized.to_dict()["train_rows"] == 500
    for spec in (plain, sized, CellSpec(1, (9,), 0.1, stop_after=300)):
        assert CellSpec.from_dict(json.loads(json.dumps(spec.to_dict()))) == spec


# --------------------------------------------------------------------------- files

def test_runs_csv_holds_the_columns_in_order_sorted_runs_and_empty_cells(tmp_path) -> None:
    runs = [_run(depth=4, seed=1), _run(depth=2, seed=1, validation_accuracy=math.nan),
            _run(depth=2, seed=0, train_rows=300)]
    path = write_runs_csv(runs, tmp_path / "runs.csv")
    with path.open(newline="") as f:
        reader = csv.DictReader(f)                                      # reference: Python's csv module
        rows = list(reader)
    assert tuple(reader.fieldnames) == RUN_COLUMNS
    assert [(r["depth"], r["seed"]) for r in rows] == [("2", "0"), ("2", "1"), ("4", "1")]
    assert rows[0]["train_rows"] == "300" and rows[1]["train_rows"] == ""          # not recorded: empty
    assert rows[1]["validation_accuracy"] == "" and rows[0]["status"] == "converged"


def test_runs_jsonl_stores_nan_as_null_and_reads_back(tmp_path) -> None:
    run = _run(validation_accuracy=math.nan, eval_steps=(20, 40), train_loss=(0.9, math.nan),
               probe_steps=(1, 40), displacement=((0.0, 1.5),), snr_db=((3.0, math.nan),))
    path = write_runs_jsonl([run, _run(seed=1)], tmp_path / "runs.jsonl")
    lines = path.read_text().splitlines()
    first = json.loads(lines[0])                                        # reference: Python's json module
    assert len(lines) == 2 and first["validation_accuracy"] is None and first["snr_db"] == [[3.0, None]]
    back = RunResult.from_dict(first)
    assert math.isnan(back.validation_accuracy) and math.isnan(back.train_loss[1]) and math.isnan(back.snr_db[0][1])
    assert back.to_dict() == first


def test_the_atomic_writer_leaves_no_temporary_file_and_names_the_target(tmp_path) -> None:
    target = tmp_path / "fit.json"
    write_text_atomic(target, "é\n")
    assert target.read_bytes() == "é\n".encode() and os.listdir(tmp_path) == ["fit.json"]
    missing = tmp_path / "no-such-folder" / "runs.csv"
    with pytest.raises(OSError) as err:
        write_bytes_atomic(missing, b"x")
    assert err.value.filename == str(missing)                           # the file the user knows, not *.tmp
