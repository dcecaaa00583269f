"""Keeping a committed sample's bytes when a rerun changes only what the clock and the checkout give.

The end-to-end check (the demo trained again over its own sample leaves every file's bytes as they
were) is in tests/test_cli.py; these pin the rules file by file. The rules are our own: a run's
identity is everything it measured, and its timings are the machine's (common practice for
reproducibility checks: compare results, not wall clocks).
"""
from __future__ import annotations

import json
from pathlib import Path

from depthplan.sweep.sample import keep_unchanged, restore_reproduced_runs, same_runs, snapshot

CSV = "depth,seed,iterations,wall_seconds,seconds_per_update\n2,0,6240,{w},{s}\n2,1,6540,0.9,0.00014\n"


def test_runs_that_differ_only_in_their_timings_are_the_same_runs() -> None:
    old = CSV.format(w=0.89, s=0.000143).encode()
    assert same_runs(old, CSV.format(w=0.42, s=0.000066).encode())
    assert not same_runs(old, old.replace(b"6540", b"6560"))                 # a different T is news
    rows = [{"depth": 2, "iterations": 6240, "wall_seconds": 0.9, "train_loss": [1.0, 0.1]}]
    jsonl = "\n".join(json.dumps(r) for r in rows).encode()
    assert same_runs(jsonl, jsonl.replace(b"0.9", b"0.4"), "runs.jsonl")
    assert not same_runs(jsonl, jsonl.replace(b"0.1]", b"0.2]"), "runs.jsonl")
    assert not same_runs(b"\xff\xfe", jsonl, "runs.jsonl")                  # unreadable: never "the same"


def test_reproduced_runs_get_their_committed_bytes_back_and_others_do_not(tmp_path: Path) -> None:
    (tmp_path / "runs.csv").write_text(CSV.format(w=0.89, s=0.000143))
    snap = snapshot(tmp_path)
    (tmp_path / "runs.csv").write_text(CSV.format(w=0.42, s=0.000066))
    assert restore_reproduced_runs(tmp_path, snap)
    assert (tmp_path / "runs.csv").read_bytes() == snap["runs.csv"]
    (tmp_path / "runs.csv").write_text(CSV.format(w=0.42, s=0.000066).replace("6540", "6560"))
    assert not restore_reproduced_runs(tmp_path, snap)
    assert b"6560" in (tmp_path / "runs.csv").read_bytes()
    assert not restore_reproduced_runs(tmp_path, {})                          # no sample: nothing to do


def test_only_dates_and_the_checkout_path_are_masked(tmp_path: Path) -> None:
    report = ("| runs | written 2026-12-03 14:19 UTC |\n| config file | `/work/main/configs/demo.yaml` |\n"
              "stored 2026-12-03T14:02:21+0000; storage sqlite:////work/main/results/demo/store.db\n"
              "| fit | reused fit.json: it is newer than the runs; bootstrap seed 0 |\n"
              f"| depthplan commit | {'2471c8c8' * 5} |\n| 12 | 1,500 | 0.321 |\n")
    (tmp_path / "report.md").write_text(report)
    (tmp_path / "figures").mkdir()
    (tmp_path / "figures" / "loss.png").write_bytes(b"\x89PNG\x00\xff")
    snap = snapshot(tmp_path)
    assert set(snap) == {"report.md", "figures/loss.png"}
    elsewhere = (report.replace("2026-12-03 14:19", "2027-01-05 09:02").replace("/work/main", "/home/ana/dp")
                 .replace("2026-12-03T14:02:21+0000", "2027-01-05T09:01:58+0100")
                 .replace("2471c8c8" * 5, "9c25fcd0" * 5 + " (with uncommitted changes)")
                 .replace("reused fit.json: it is newer than the runs",
                          "fitted now (400 bootstrap resamples) because runs.csv changed after the stored one was written"))
    (tmp_path / "report.md").write_text(elsewhere)
    (tmp_path / "figures" / "loss.png").write_bytes(b"\x89PNG\x00\xfe")       # a changed figure is news
    assert keep_unchanged(tmp_path, snap) == ["report.md"]
    assert (tmp_path / "report.md").read_bytes() == snap["report.md"]
    assert (tmp_path / "figures" / "loss.png").read_bytes() == b"\x89PNG\x00\xfe"
    (tmp_path / "report.md").write_text(report.replace("1,500", "1,520"))    # a measured number changed
    assert keep_unchanged(tmp_path, snap) == []
    assert b"1,520" in (tmp_path / "report.md").read_bytes()
