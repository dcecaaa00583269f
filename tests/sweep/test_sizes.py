"""Proxy sizes of a sweep (sweep.widths, sweep.train_rows, sweep.verify, target): rows, cells, bad input, end to end.

The row draw is checked against the exact class shares by brute force over every prefix; the
quota method it uses keeps every class within one row of its share (Balinski and Young 1975, from
memory); the checks below do not rely on that claim, they count.
"""
from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from datetime import datetime

import numpy as np
import pytest

from depthplan.cli import main
from depthplan.config import load_config
from depthplan.records import CellSpec
from depthplan.sweep.run import plan_cells, run_sweep
from depthplan.sweep.sizes import PREDICTION_KEY, draw_rows, sized_inputs
from depthplan.sweep.storage import SweepStore, local_url
from depthplan.train.datasets import load_dataset


def _labels() -> list[np.ndarray]:
    from sklearn.datasets import load_digits

    rng = np.random.default_rng(5)
    skewed = rng.choice(5, 700, p=[0.55, 0.25, 0.12, 0.06, 0.02])      # invented, strongly unbalanced
    return [load_digits().target.astype(np.int64), skewed]


@pytest.mark.parametrize("which", [0, 1])
def test_row_draws_are_stratified_within_one_row_nested_and_seeded(which):
    y = _labels()[which]
    classes, counts = np.unique(y, return_counts=True)
    share = counts / len(y)
    full = draw_rows(y, len(y), seed=3)
    assert sorted(full) == list(range(len(y)))                          # a permutation of the split
    held = np.zeros(len(classes))
    for n in range(1, len(y) + 1):                                      # every prefix, counted
        held[np.searchsorted(classes, y[full[n - 1]])] += 1
        assert np.abs(held - n * share).max() < 1.0, n
    for n in (37, 200, 500):
        rows = draw_rows(y, n, seed=3)
        assert len(set(rows)) == n
        assert list(rows) == list(full[:n])                             # nested: a prefix of every larger draw
        assert list(rows) == list(draw_rows(y, n, seed=3))              # same seed, same rows
    assert list(draw_rows(y, 200, seed=4)) != list(draw_rows(y, 200, seed=3))


def test_a_cell_of_n_rows_trains_on_those_rows_and_width(tiny_config):
    cfg = load_config(tiny_config)
    data = load_dataset(cfg.data)
    model, sub = sized_inputs(CellSpec(depth=2, seeds=(0,), learning_rate=0.05, width=24, train_rows=300), cfg, data)
    assert model.widths(2) == (24, 24) and len(sub.y_train) == 300 and sub.x_train.shape == (300, data.n_features)
    idx = np.sort(draw_rows(data.y_train, 300, cfg.data.split_seed))
    assert np.array_equal(sub.x_train, data.x_train[idx]) and np.array_equal(sub.x_val, data.x_val)


def test_sweeps_without_size_axes_keep_their_cell_ids_and_fingerprint(write_yaml, tiny_config):
    TINY = tiny_config.read_text()
    plain = load_config(tiny_config)
    # the id format of stores written before size axes existed
    assert [c.cell_id for c in plan_cells(plain)] == ["K1-lr0.05-fixed-s0-1", "K2-lr0.05-fixed-s0-1"]
    sized = load_config(write_yaml(TINY.replace("  seeds: 2\n", "  seeds: 2\n  widths: [4, 8]\n"), "b.yaml"))
    assert [c.cell_id for c in plan_cells(sized)] == ["W4-K1-lr0.05-fixed-s0-1", "W4-K2-lr0.05-fixed-s0-1",
                                                       "W8-K1-lr0.05-fixed-s0-1", "W8-K2-lr0.05-fixed-s0-1"]
    assert sized.fingerprint() != plain.fingerprint()
    # the target changes no measurement: a store stays resumable when only the target changes
    with_target = load_config(write_yaml(TINY.replace("  seeds: 2\n", "  seeds: 2\n  widths: [4, 8]\n")
                                         + "target: {width: 64}\n", "c.yaml"))
    assert with_target.fingerprint() == sized.fingerprint()
    spec = plan_cells(sized)[0]
    assert CellSpec.from_dict(spec.to_dict()) == spec and "width" not in plan_cells(plain)[0].to_dict()


BAD = [
    ("  widths: [8, 16]\n", "target: {width: 4}\n", "target.width: 4 is smaller than every proxy (8 to 16)"),
    ("", "target: {width: 64}\n", "target: one proxy size only"),
    ("  widths: [8, 0]\n", "", "sweep.widths[1]: must be a positive integer, got 0"),
    ("  widths: [8, 2.5]\n", "", "sweep.widths[1]: must be a positive integer, got 2.5"),
    ("  train_rows: [100, -3]\n", "", "sweep.train_rows[1]: must be a positive integer, got -3"),
    ("  train_rows: [100, 5000]\n", "", "sweep.train_rows[1]: 5000 is more than the training split has (1437 rows)"),
    ("  widths: [8, 32]\n  verify: {width: 16}\n", "", "sweep.verify.width: 16 lies inside the swept widths (8 to 32)"),
    ("  widths: [8, 32]\n  verify: {width: 32}\n", "", "sweep.verify.width: 32 is one of the swept widths"),
    ("  verify: {train_rows: 900}\n", "", "sweep.verify.train_rows: needs sweep.train_rows with two or more values"),
    ("  widths: [8, 16]\n  verify: {train_rows: 4000}\n", "", "sweep.verify.train_rows: needs sweep.train_rows"),
    ("  train_rows: [100, 200]\n  verify: {train_rows: 4000}\n", "",
     "sweep.verify.train_rows: 4000 is more than the training split has (1437 rows)"),
]


@pytest.mark.parametrize("sweep_lines, target, says", BAD)
def test_bad_sizes_are_one_line_naming_the_key_at_check_and_run(write_yaml, tiny_config, tmp_path, capsys,
                                                                sweep_lines, target, says):
    path = write_yaml(tiny_config.read_text().replace("  seeds: 2\n", "  seeds: 2\n" + sweep_lines) + target, "bad.yaml")
    for command in (["check", str(path)], ["run", str(path), "--out", str(tmp_path / "res"), "-q"]):
        assert main(command) == 2                                       # in-process: the CLI's own handling
        err = capsys.readouterr().err
        assert says in err and err.count("\n") == 1, err
    assert not (tmp_path / "res" / "store.db").exists()                 # refused before any training


def test_size_axes_with_adaptive_depths_or_rate_tuning_are_refused(write_yaml, tiny_config):
    from depthplan.errors import ConfigError

    TINY = tiny_config.read_text()
    adaptive = TINY.replace("  depths: [1, 2]\n", "  depths: {low: 1, high: 8}\n  widths: [4, 8]\n")
    with pytest.raises(ConfigError, match=r"sweep\.widths: cannot be combined with an adaptive sweep\.depths"):
        load_config(write_yaml(adaptive))
    tuned = TINY.replace("  seeds: 2\n", "  seeds: 2\n  train_rows: [200, 400]\n").replace(
        "  learning_rate: 0.05\n", "  learning_rate: {low: 0.01, high: 0.1, trials: 2}\n")
    with pytest.raises(ConfigError, match=r"sweep\.train_rows: cannot be combined with the train\.learning_rate tuning"):
        load_config(write_yaml(tuned, "t.yaml"))


SIZED = """
name: sized
data: {source: digits}
sweep: {depths: [1, 2, 3], seeds: 2, widths: [4, 8], verify: {width: 12}, train_rows: [300, 600]}
train: {learning_rate: 0.1, max_updates: 300, eval_every: 10, converge_when: {train_loss_below: 1.0}}
probes: {n_points: 4, snr_window: 2}
target: {width: 32, train_rows: 1200}
"""


def test_two_widths_and_a_held_out_width_end_to_end(write_yaml, tmp_path):
    cfg = load_config(write_yaml(SIZED))
    out = tmp_path / "res"
    summary = run_sweep(cfg, out=out, show_progress=False)
    with (out / "runs.csv").open() as fh:
        rows = list(csv.DictReader(fh))
    # 2 widths x 2 row counts swept, then the held-out width at the largest row count; 3 depths, 2 seeds
    assert summary.n_cells == 5 * 3 and len(rows) == 5 * 3 * 2
    assert {(r["width"], r["train_rows"]) for r in rows} == {("4", "300"), ("4", "600"), ("8", "300"),
                                                              ("8", "600"), ("12", "600")}
    info = json.loads((out / "sweep.json").read_text())
    assert info["verify"]["width"] == 12 and info["verify"]["train_rows"] == 600
    assert info["target"] == {"width": 32, "train_rows": 1200, "n_params": None}
    stored = SweepStore(local_url(out), "sized")
    record = stored.meta()[PREDICTION_KEY]
    assert record == info["verify"]["prediction"] and record["n_runs"] == 4 * 3 * 2   # swept sizes only
    # stored before any run of the held-out size started (Optuna records each trial's start)
    made = datetime.strptime(record["predicted_at"], "%Y-%m-%dT%H:%M:%S%z").timestamp()
    started = [t.datetime_start.timestamp() for t in stored.study.get_trials(deepcopy=False)
               if t.user_attrs.get("cell_id", "").startswith("W12-")]
    assert len(started) == 3 and made <= min(started) + 1.0        # the stamp has one-second resolution
    again = run_sweep(cfg, out=out, show_progress=False)             # resumed: nothing trained, prediction kept
    assert again.n_trained == 0 and SweepStore(local_url(out), "sized").meta()[PREDICTION_KEY] == record
    # fit and report pick the target and the held-out size up from sweep.json
    proc = subprocess.run([sys.executable, "-m", "depthplan", "fit", str(out), "--bootstrap", "40"],
                          capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    t = json.loads((out / "fit.json").read_text())["transfer"]
    assert {(z["width"], z["train_rows"]) for z in t["sizes"]} == {(4, 300), (4, 600), (8, 300), (8, 600)}
    assert t["verify"]["width"] == 12 and t["verify"]["measured"]["n_runs"] == 6
    assert t["target"]["width"] == 32 and t["target"]["train_rows"] == 1200
    assert t["headline_size"] == {"width": 12, "train_rows": 600}
    assert "Target (width 32, 1200 training rows" in proc.stdout


def test_two_workers_serve_the_swept_and_the_held_out_round_without_a_respawn(write_yaml, tmp_path):
    # the pool keeps round one's processes for the held-out round (a respawn re-imports torch): the
    # cells of both rounds name at most the same two worker pids, and the prediction still precedes
    # the first held-out start
    cfg = load_config(write_yaml(SIZED))
    out = tmp_path / "res"
    summary = run_sweep(cfg, out=out, workers=2, show_progress=False)
    assert summary.n_trained == 5 * 3 and summary.n_runs == 5 * 3 * 2
    stored = SweepStore(local_url(out), "sized")
    trials = [t for t in stored.study.get_trials(deepcopy=False) if t.user_attrs.get("cell_id")]
    holders = {t.user_attrs["cell_id"]: t.system_attrs["depthplan_worker"] for t in trials}
    # (fresh processes for the held-out round would make three or four holders: two per round)
    assert len(holders) == 15 and len(set(holders.values())) <= 2
    assert all(not h.endswith(f":{os.getpid()}") for h in holders.values())       # none trained in-process
    made = datetime.strptime(stored.meta()[PREDICTION_KEY]["predicted_at"], "%Y-%m-%dT%H:%M:%S%z").timestamp()
    assert made <= min(t.datetime_start.timestamp() for t in trials
                       if t.user_attrs["cell_id"].startswith("W12-")) + 1.0


def test_plain_tiny_sweep_writes_no_size_facts(tiny_config, tmp_path):
    run_sweep(load_config(tiny_config), out=tmp_path / "res", show_progress=False)
    info = json.loads((tmp_path / "res" / "sweep.json").read_text())
    assert not {"sizes", "verify", "target"} & set(info)
    with (tmp_path / "res" / "runs.csv").open() as fh:
        assert {r["train_rows"] for r in csv.DictReader(fh)} == {""}
