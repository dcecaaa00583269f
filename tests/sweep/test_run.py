"""Sweeps end to end: store, resume after an interruption, refuse a changed config, two workers."""
from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from depthplan.config import load_config
from depthplan.errors import StoreError
from depthplan.sweep.storage import SweepStore, local_url
from depthplan.sweep.run import plan_cells, run_sweep

SLOW = """
name: slow
data: {source: digits}
model: {width: 16}
sweep: {depths: [1, 2, 3, 4], seeds: 2, seeds_per_cell: 1}
train: {learning_rate: 0.001, max_updates: 1500, eval_every: 50, converge_when: {train_loss_below: 0.01}}
probes: {n_points: 4, snr_window: 2}
"""


def _env() -> dict[str, str]:
    env = dict(os.environ, DEPTHPLAN_HEARTBEAT_S="1", DEPTHPLAN_GRACE_S="3", PYTHONUNBUFFERED="1")
    return env


def _start(config: Path, out: Path, *extra: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "depthplan", "run", str(config), "--out", str(out), "-q", *extra],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=_env())


def _wait_for_cells(out: Path, name: str, n: int, proc: subprocess.Popen, timeout_s: float = 400) -> None:
    deadline = time.time() + timeout_s
    while time.time() < deadline:
        if proc.poll() is not None:                   # the run ended early: show why instead of waiting
            _, err = proc.communicate()
            raise AssertionError(f"depthplan run exited with {proc.returncode} before {n} cells: {err[-2000:]}")
        if (out / "store.db").exists():
            try:
                if SweepStore(local_url(out), name).counts()["complete"] >= n:
                    return
            except StoreError:
                pass
        time.sleep(0.3)
    raise AssertionError(f"fewer than {n} cells finished within {timeout_s} s")


def _rows(out: Path) -> list[dict]:
    with (out / "runs.csv").open() as fh:
        return list(csv.DictReader(fh))


def test_tiny_sweep_stores_one_row_per_seed_run(tiny_config: Path, tmp_path: Path) -> None:
    cfg = load_config(tiny_config)
    summary = run_sweep(cfg, out=tmp_path / "res", show_progress=False)
    rows = _rows(tmp_path / "res")
    assert summary.n_runs == 4 and len(rows) == 4
    assert {(r["depth"], r["seed"]) for r in rows} == {("1", "0"), ("1", "1"), ("2", "0"), ("2", "1")}
    for r in rows:
        assert r["status"] in ("converged", "censored")
        if r["status"] == "censored":
            assert r["iterations"] == "60"            # a censored run records its budget
        assert int(r["iterations"]) % 20 == 0         # T has the resolution of eval_every
        assert float(r["wall_seconds"]) > 0 and int(r["n_params"]) > 0
    for f in ("config.yaml", "sweep.json", "runs.jsonl", "store.db"):
        assert (tmp_path / "res" / f).exists()
    again = run_sweep(cfg, out=tmp_path / "res", show_progress=False)
    assert again.n_trained == 0 and again.n_runs == 4            # nothing is trained twice


@pytest.mark.parametrize("how", ["interrupt", "kill"])
def test_rerun_after_interruption_finishes_only_what_is_missing(write_yaml, tmp_path: Path, how: str) -> None:
    config = write_yaml(SLOW)
    out = tmp_path / "res"
    proc = _start(config, out, "--workers", "1")
    _wait_for_cells(out, "slow", 2, proc)
    proc.send_signal(signal.SIGINT if how == "interrupt" else signal.SIGKILL)
    _, err = proc.communicate(timeout=60)
    if how == "interrupt":
        assert proc.returncode == 130
        assert "run the same command again" in err and "Traceback" not in err
    store = SweepStore(local_url(out), "slow")
    done_before = {cid for cid, _ in store.completed_cells()}
    assert 2 <= len(done_before) < 8
    rerun = _start(config, out, "--workers", "1")
    out_text, err = rerun.communicate(timeout=300)
    assert rerun.returncode == 0, err
    assert f"{8 - len(done_before)} cells trained now" in out_text
    cells = store.completed_cells()
    ids = [cid for cid, _ in cells]
    assert sorted(ids) == sorted(c.cell_id for c in plan_cells(load_config(config)))   # each exactly once
    assert len(_rows(out)) == 8


def test_changed_config_is_refused_and_nothing_is_lost(tiny_config: Path, tmp_path: Path) -> None:
    out = tmp_path / "res"
    run_sweep(load_config(tiny_config), out=out, show_progress=False)
    before = (out / "runs.csv").read_text()
    changed = tiny_config.read_text().replace("learning_rate: 0.05", "learning_rate: 0.07")
    tiny_config.write_text(changed)
    proc = subprocess.run([sys.executable, "-m", "depthplan", "run", str(tiny_config), "--out", str(out)],
                          capture_output=True, text=True)
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert "different config (changed: train.learning_rate)" in proc.stderr and "--out DIR" in proc.stderr
    assert (out / "runs.csv").read_text() == before
    assert len(SweepStore(local_url(out), "tiny").results()) == 4


def test_two_local_workers_record_every_cell_exactly_once(write_yaml, tmp_path: Path) -> None:
    config = write_yaml(SLOW.replace("max_updates: 1500", "max_updates: 300"))
    out = tmp_path / "res"
    proc = _start(config, out, "--workers", "2")
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err
    ids = [cid for cid, _ in SweepStore(local_url(out), "slow").completed_cells()]
    assert len(ids) == 8 and len(set(ids)) == 8
    assert len(_rows(out)) == 8


def test_resume_after_a_kill_reclaims_the_dead_workers_cell_at_once(write_yaml, tmp_path: Path) -> None:
    """The embedded store is opened by this machine's processes only: a cell held by a pid that
    no longer exists is given back on resume without waiting out the heartbeat grace period."""
    config = write_yaml(SLOW)
    out = tmp_path / "res"
    proc = _start(config, out, "--workers", "1")
    _wait_for_cells(out, "slow", 1, proc)
    store = SweepStore(local_url(out), "slow")
    deadline = time.time() + 120
    while not any(h.endswith(f":{proc.pid}") for h in store.holders().values()) and time.time() < deadline:
        time.sleep(0.05)
    (held,) = [cid for cid, h in store.holders().items() if h.endswith(f":{proc.pid}")]
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=60)
    env = {k: v for k, v in _env().items() if k != "DEPTHPLAN_GRACE_S"}   # the default grace period
    rerun = subprocess.run([sys.executable, "-m", "depthplan", "-v", "run", str(config), "--out", str(out), "-q",
                            "--workers", "1"], capture_output=True, text=True, env=env, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    assert f"reclaimed cell {held} at once: its worker" in rerun.stderr
    failed = [t for t in store.study.get_trials(deepcopy=False) if t.state.name == "FAIL"]
    assert [t.system_attrs["depthplan_failure"] for t in failed] == [f"reclaimed: its worker {h} is gone"
                                                                     for h in [failed[0].system_attrs["depthplan_worker"]]]
    ids = [cid for cid, _ in store.completed_cells()]
    assert sorted(ids) == sorted(c.cell_id for c in plan_cells(load_config(config)))   # each exactly once


def test_five_kills_with_two_workers_then_a_clean_finish_match_an_uninterrupted_run(write_yaml, tmp_path: Path) -> None:
    """Chaos: the whole `run` (parent and its two workers) is SIGKILLed five times at seeded random
    moments; the sixth run finishes. Every planned run is stored exactly once, and equals what an
    uninterrupted in-process run computes (same seeds, one thread: deterministic)."""
    import random

    config = write_yaml(SLOW.replace("max_updates: 1500", "max_updates: 400"))
    cfg = load_config(config)
    out = tmp_path / "res"
    rng = random.Random(14)
    kills = 0
    for _ in range(5):
        proc = subprocess.Popen([sys.executable, "-m", "depthplan", "run", str(config), "--out", str(out), "-q",
                                 "--workers", "2"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                env=_env(), start_new_session=True)
        try:
            proc.wait(timeout=rng.uniform(2.0, 6.0))
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)              # the run and both of its workers at once
            kills += 1
        proc.communicate(timeout=60)
    final = _start(config, out, "--workers", "2")
    _, err = final.communicate(timeout=300)
    assert final.returncode == 0, err
    print(f"{kills} of 5 runs were killed before they finished")
    ids = [cid for cid, _ in SweepStore(local_url(out), "slow").completed_cells()]
    assert sorted(ids) == sorted(c.cell_id for c in plan_cells(cfg))     # each cell stored exactly once
    ref = run_sweep(cfg, out=tmp_path / "ref", show_progress=False)
    assert ref.n_runs == 8

    def key(rows: list[dict]) -> dict:
        return {(r["depth"], r["seed"], r["learning_rate"]): (r["status"], r["iterations"], r["final_train_loss"])
                for r in rows}

    got, want = _rows(out), _rows(tmp_path / "ref")
    assert len(got) == 8 and key(got) == key(want)
