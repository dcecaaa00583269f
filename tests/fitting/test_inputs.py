"""Tests of depthplan.fitting.inputs and of fit_path: reading results folders and measurement tables.

All tables here are invented for the tests.
"""
from __future__ import annotations

import json
import logging
import math
from dataclasses import replace
from pathlib import Path

import pytest

from depthplan.errors import DataError
from depthplan.fitting.assemble import default_json_path, fit_path
from depthplan.records import RunResult, write_runs_csv
from depthplan.fitting.inputs import eval_interval, load_runs, read_table

# invented readings: T = 12000 / K with a little scatter, three seeds per depth
ROWS = [(k, s, round(12000 / k * (1 + 0.03 * (s - 1)))) for k in (1, 2, 3, 4, 6) for s in range(3)]


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


def table(tmp_path: Path, name: str = "timings.csv", extra: str = "") -> Path:
    lines = ["depth,seed,iterations" + (",status" if extra else "")]
    lines += [f"{k},{s},{t}" + (f",{extra}" if extra else "") for k, s, t in ROWS]
    return write(tmp_path / name, "\n".join(lines) + "\n")


def record(depth: int, seed: int, iterations: int, **kw) -> RunResult:
    base = dict(depth=depth, width=8, seed=seed, learning_rate=0.05, status="converged",
                iterations=iterations, wall_seconds=1.0, seconds_per_update=1e-3 * depth,
                final_train_loss=0.1, final_train_accuracy=0.95, validation_accuracy=0.9,
                n_params=100)
    return RunResult(**{**base, **kw})


def test_minimal_table_reads_with_defaults(tmp_path):
    path = write(tmp_path / "t.csv", "\ufeffDepth , iterations\n1,1000\n2,520\n\n2,480\n3,330\n")
    runs = read_table(path)
    assert [(r.depth, r.seed, r.iterations, r.status) for r in runs] == [
        (1, 0, 1000, "converged"), (2, 0, 520, "converged"), (2, 1, 480, "converged"),
        (3, 0, 330, "converged")]
    assert math.isnan(runs[0].seconds_per_update) and math.isnan(runs[0].learning_rate)


def test_optional_columns_are_read(tmp_path):
    path = write(tmp_path / "t.csv",
                 "depth,iterations,seed,status,seconds_per_update,learning_rate,width,eval_every\n"
                 "4,20000,7,Censored,0.25,0.1,512,50\n")
    (r,) = read_table(path)
    assert (r.depth, r.iterations, r.seed, r.status) == (4, 20000, 7, "censored")
    assert (r.seconds_per_update, r.learning_rate, r.width) == (0.25, 0.1, 512)
    assert r.extra == {"eval_every": 50}
    assert eval_interval([r]) == 50


@pytest.mark.parametrize("text, message", [
    ("depth,iterations\n1,100\n2,200\n3,abc\n",
     r"timings\.csv line 4, column iterations: must be a positive number, got 'abc'"),
    ("depth,iterations\n1,100\n0,200\n",
     r"timings\.csv line 3, column depth: must be a whole number >= 1, got '0'"),
    ("depth,iterations\n1,100\n2.5,200\n",
     r"line 3, column depth: must be a whole number >= 1, got '2\.5'"),
    ("depth,iterations\n1,-4\n", r"line 2, column iterations: must be a positive number, got '-4'"),
    ("depth,iterations\n1,\n", r"line 2, column iterations: must be a positive number \(the cell is empty\)"),
    ("depth,iterations,status\n1,100,done\n",
     r"line 2, column status: must be one of converged\|censored\|diverged, got 'done'"),
    ("depth,iterations,seconds_per_update\n1,100,0\n",
     r"line 2, column seconds_per_update: must be a positive number, got '0'"),
    ("depth,seed\n1,0\n", r"timings\.csv line 1: missing column iterations"),
    ("iterations\n100\n", r"line 1: missing column depth"),
    ("depth,iterations,secs_per_update\n1,100,2\n",
     r"unknown column 'secs_per_update' \(did you mean 'seconds_per_update'\?\)"),
    ("", r"timings\.csv: empty file"),
    ("depth,iterations\n", r"timings\.csv: no data rows"),
    ("depth,iterations\n1,100,5\n", r"line 2: 3 fields but the header has 2"),
])
def test_bad_tables_name_file_line_and_column(tmp_path, text, message):
    path = write(tmp_path / "timings.csv", text)
    with pytest.raises(DataError, match=message):
        load_runs(path)


def test_binary_file_is_refused(tmp_path):
    path = tmp_path / "timings.csv"
    path.write_bytes(b"depth,iterations\n\xff\xfe\x00\x01\n")
    with pytest.raises(DataError, match="not UTF-8"):
        load_runs(path)


def test_missing_path_and_empty_results_folder(tmp_path):
    with pytest.raises(DataError, match=r"nowhere\.csv: no such file or folder"):
        load_runs(tmp_path / "nowhere.csv")
    folder = tmp_path / "results"
    folder.mkdir()
    with pytest.raises(DataError, match=r"results: no finished runs yet; run `depthplan run CONFIG`"):
        load_runs(folder)
    write(folder / "runs.csv", ",".join(["depth", "iterations"]) + "\n")
    with pytest.raises(DataError, match="no finished runs yet"):
        load_runs(folder)


def test_results_folder_jsonl_round_trip_with_probes(tmp_path):
    runs = [record(k, s, 1000 // k, probe_steps=(1, 10, 100, 1000),
                   displacement=((0.1, 1.0, 3.0, 9.0),), snr_db=((20.0, 15.0, -10.0, -20.0),),
                   eval_steps=(20, 40, 60), train_loss=(1.0, 0.5, math.nan))
            for k in (1, 2, 3) for s in range(2)]
    lines = [json.dumps(r.to_dict()) for r in runs]
    write(tmp_path / "runs.jsonl", "\n".join(lines) + "\n")
    back = load_runs(tmp_path)
    assert [(r.depth, r.seed, r.iterations) for r in back] == [(r.depth, r.seed, r.iterations)
                                                               for r in runs]
    assert back[0].displacement == runs[0].displacement
    assert math.isnan(back[0].train_loss[-1])
    assert eval_interval(back) == 20


def test_torn_last_jsonl_record_is_skipped_but_a_torn_middle_is_an_error(tmp_path, caplog):
    good = json.dumps(record(1, 0, 100).to_dict())
    write(tmp_path / "runs.jsonl", f"{good}\n{good}\n{good[:40]}")
    with caplog.at_level(logging.WARNING, logger="depthplan.fitting.inputs"):
        assert len(load_runs(tmp_path)) == 2
    assert "torn last record" in caplog.text
    write(tmp_path / "runs.jsonl", f"{good}\n{good[:40]}\n{good}\n")
    with pytest.raises(DataError, match=r"runs\.jsonl line 2: not a run record"):
        load_runs(tmp_path)


def test_runs_csv_from_the_sweep_reads_back(tmp_path):
    runs = [record(k, s, 900 // k, lr_mode="tuned", status="censored" if k == 1 else "converged")
            for k in (1, 2, 3) for s in range(2)]
    write_runs_csv(runs, tmp_path / "runs.csv")
    back = load_runs(tmp_path)
    key = lambda r: (r.depth, r.seed)  # noqa: E731
    for a, b in zip(sorted(runs, key=key), sorted(back, key=key)):
        assert b == replace(a, extra={})


def test_fit_path_writes_beside_a_table_and_to_json_out(tmp_path):
    path = table(tmp_path)
    fit, written = fit_path(path, n_boot=60)
    assert written == tmp_path / "timings.fit.json" == default_json_path(path)
    on_disk = json.loads(written.read_text(), parse_constant=lambda c: pytest.fail(c))
    assert on_disk["source"] == str(path) and on_disk["input"]["kind"] == "table"
    assert on_disk["power_law"]["slope"] == pytest.approx(-1.0, abs=0.05)
    assert not list(tmp_path.glob("*.tmp"))
    other = tmp_path / "out.json"
    _, written = fit_path(path, other, n_boot=60)
    assert written == other and other.is_file()
    with pytest.raises(DataError, match="does not exist"):
        fit_path(path, tmp_path / "no" / "fit.json", n_boot=60)


def test_fit_path_on_a_results_folder_reads_sweep_json(tmp_path):
    runs = [record(k, s, t) for k, s, t in ROWS]
    write_runs_csv(runs, tmp_path / "runs.csv")
    write(tmp_path / "sweep.json", json.dumps({"name": "kiln", "eval_every": 400,
                                               "max_updates": 20000}))
    fit, written = fit_path(tmp_path, n_boot=60)
    assert written == tmp_path / "fit.json"
    assert fit["input"] == {"kind": "results_folder", "sweep_name": "kiln", "max_updates": 20000}
    assert fit["eval_every"] == 400
    assert any("evaluation every 400 updates is coarse" in w for w in fit["warnings"])


def test_fit_path_refuses_a_table_with_two_depths(tmp_path):
    path = write(tmp_path / "timings.csv", "depth,iterations\n1,100\n1,110\n2,50\n")
    with pytest.raises(DataError, match=r"timings\.csv: runs at 2 depths \(1, 2\); a depth law "
                                        r"needs at least three"):
        fit_path(path, n_boot=60)


@pytest.mark.parametrize("cell, words", [
    ("1500.5", "must be a whole number of updates"),       # updates are counted, never fractional
    ("1e308", "is more updates than any run takes"),         # would overflow exp() in the fit
])
def test_implausible_iterations_refused_in_one_line(tmp_path, cell, words):
    # Common practice: an update count is a whole number; 10^15 is far beyond any training run.
    path = tmp_path / "t.csv"
    path.write_text(f"depth,iterations\n1,1000\n2,{cell}\n3,400\n", encoding="utf-8")
    with pytest.raises(DataError, match=rf"t\.csv line 3, column iterations: {words}.*got '{cell}'"):
        load_runs(path)
