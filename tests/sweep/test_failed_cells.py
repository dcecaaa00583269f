"""A cell whose training raises is stored as failed, the sweep carries on, a rerun retries it."""
from __future__ import annotations

import csv
import logging
from pathlib import Path

import pytest

from depthplan.cli import main
from depthplan.config import load_config
from depthplan.errors import ConfigError
from depthplan.sweep.run import plan_cells, run_sweep
from depthplan.sweep.storage import SweepStore, local_url
from depthplan.train import loop

SWEEP = """
name: faulty
data: {source: digits}
model: {width: 8}
sweep: {depths: [1, 2, 3], seeds: 2}
train: {learning_rate: 0.05, max_updates: 60, eval_every: 20, converge_when: {train_loss_below: 0.5}}
probes: {n_points: 6, snr_window: 4}
"""

REAL_TRAIN_CELL = loop.train_cell


def _fault_at(monkeypatch: pytest.MonkeyPatch, depth: int, error: type[Exception] = RuntimeError) -> list[int]:
    """Make training raise at `depth` while the other depths really train; return the depths trained."""
    calls: list[int] = []

    def train_cell(spec, *args, **kwargs):
        calls.append(spec.depth)
        if spec.depth == depth:
            raise error(f"injected fault at depth {depth}\nsecond line")
        return REAL_TRAIN_CELL(spec, *args, **kwargs)

    monkeypatch.setattr(loop, "train_cell", train_cell)
    return calls


def _rows(out: Path) -> list[dict]:
    with (out / "runs.csv").open() as fh:
        return list(csv.DictReader(fh))


def _trials(out: Path) -> list:
    return SweepStore(local_url(out), "faulty").study.get_trials(deepcopy=False)


def test_failed_cell_is_stored_the_sweep_carries_on_and_a_rerun_retries_it(
        write_yaml, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture) -> None:
    cfg = load_config(write_yaml(SWEEP))
    out = tmp_path / "res"
    calls = _fault_at(monkeypatch, 2)
    with caplog.at_level(logging.ERROR, logger="depthplan"):
        summary = run_sweep(cfg, out=out, show_progress=False)
    assert sorted(calls) == [1, 2, 3]
    assert summary.n_failed == 1 and summary.n_trained == 2 and summary.n_runs == 4
    (cell,) = summary.failed
    assert (cell.depth, cell.learning_rate, cell.lr_mode) == (2, 0.05, "fixed")
    assert cell.error == "RuntimeError: injected fault at depth 2"
    assert "depth 2, learning rate 0.05 (fixed): RuntimeError" in str(cell)
    assert sorted((r["depth"], r["seed"]) for r in _rows(out)) == [("1", "0"), ("1", "1"), ("3", "0"), ("3", "1")]
    (record,) = [r for r in caplog.records if r.levelno == logging.ERROR]
    assert "K2-" in record.getMessage() and "injected fault" in record.getMessage()
    assert record.exc_info is not None                               # the traceback is logged with it
    (failed,) = [t for t in _trials(out) if t.state.name == "FAIL"]
    assert failed.user_attrs["error"].startswith("RuntimeError: injected fault at depth 2")
    assert "Traceback" in failed.user_attrs["traceback"] and "injected fault" in failed.user_attrs["traceback"]
    assert len([t for t in _trials(out) if t.state.name == "WAITING"]) == 0   # not retried in this command

    calls.clear()
    monkeypatch.setattr(loop, "train_cell", REAL_TRAIN_CELL)
    again = run_sweep(cfg, out=out, show_progress=False)
    assert again.n_failed == 0 and again.failed == [] and again.n_trained == 1 and again.n_runs == 6
    assert calls == []                                               # only the real training ran
    assert sorted(r["depth"] for r in _rows(out)) == ["1", "1", "2", "2", "3", "3"]
    ids = [cid for cid, _ in SweepStore(local_url(out), "faulty").completed_cells()]
    assert sorted(ids) == sorted(c.cell_id for c in plan_cells(cfg))   # each cell stored exactly once


def test_cli_exits_1_on_a_failed_cell_and_0_after_the_retry(
        write_yaml, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture) -> None:
    config = str(write_yaml(SWEEP))
    out = tmp_path / "res"
    calls = _fault_at(monkeypatch, 3)
    assert main(["run", config, "--out", str(out), "-q", "--workers", "1"]) == 1
    printed = capsys.readouterr()
    assert "1 of 3 cells failed:" in printed.out
    assert "depth 3, learning rate 0.05 (fixed): RuntimeError: injected fault at depth 3" in printed.out
    assert "1 of 3 cells failed" in printed.err and "run the same command again" in printed.err
    assert main(["run", config, "--out", str(out), "-q", "--workers", "1"]) == 1      # still failing: retried, failed again
    assert calls.count(3) == 2 and calls.count(1) == 1 and calls.count(2) == 1
    monkeypatch.setattr(loop, "train_cell", REAL_TRAIN_CELL)
    assert main(["run", config, "--out", str(out), "-q", "--workers", "1"]) == 0
    assert "1 cells trained now" in capsys.readouterr().out
    assert len(_rows(out)) == 6


def test_worker_carries_on_past_a_failed_cell_and_exits_1(
        write_yaml, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture) -> None:
    config = str(write_yaml(SWEEP))
    out = tmp_path / "res"
    url = local_url(out)
    assert main(["run", config, "--out", str(out), "--plan-only", "-q"]) == 0
    calls = _fault_at(monkeypatch, 1)
    assert main(["worker", "--storage", url, "--study", "faulty"]) == 1
    printed = capsys.readouterr()
    assert "worker: 2 cells trained" in printed.out
    assert "depth 1, learning rate 0.05 (fixed): RuntimeError" in printed.out and "failed" in printed.err
    assert sorted(calls) == [1, 2, 3]
    monkeypatch.setattr(loop, "train_cell", REAL_TRAIN_CELL)
    assert main(["run", config, "--out", str(out), "-q", "--workers", "1"]) == 0      # collects the two, retries the failed one
    assert "1 cells trained now" in capsys.readouterr().out
    assert sorted(r["depth"] for r in _rows(out)) == ["1", "1", "2", "2", "3", "3"]


def test_bad_input_during_training_still_stops_the_sweep(
        write_yaml, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    config = str(write_yaml(SWEEP))
    out = tmp_path / "res"
    calls = _fault_at(monkeypatch, 3, ConfigError)                   # the deepest cell is handed out first
    assert main(["run", config, "--out", str(out), "-q", "--workers", "1"]) == 2
    assert calls == [3]                                              # nothing after the bad cell was trained
    store = SweepStore(local_url(out), "faulty")
    assert store.failures() == []                                    # given back, not stored as failed
    assert store.counts()["waiting"] == 3
