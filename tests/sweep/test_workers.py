"""Crash safety with several workers: a worker killed mid-cell has its cell rerun, recorded once.

Runs against a real PostgreSQL server (a throwaway cluster on 127.0.0.1, started here
from Debian's postgresql package) and against the embedded SQLite store.
"""
from __future__ import annotations

import csv
import glob
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

from depthplan.config import load_config
from depthplan.sweep.storage import SweepStore, local_url
from depthplan.sweep.run import plan_cells

CONFIG = """
name: crash
data: {source: digits}
model: {width: 16}
sweep: {depths: [1, 2, 3], seeds: 4, seeds_per_cell: 2}
train: {learning_rate: 0.001, max_updates: 20000, eval_every: 100, converge_when: {train_loss_below: 0.01}}
probes: {n_points: 4, snr_window: 2}
"""


def _pg_bin(name: str) -> str | None:
    found = shutil.which(name)
    if found:
        return found
    hits = sorted(glob.glob(f"/usr/lib/postgresql/*/bin/{name}"))
    return hits[-1] if hits else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def postgres_url():
    initdb, pg_ctl = _pg_bin("initdb"), _pg_bin("pg_ctl")
    if not (initdb and pg_ctl):
        pytest.skip("PostgreSQL server binaries not found (apt-get install postgresql; .ci/run does this)")
    try:
        import psycopg2  # noqa: F401
    except ImportError:
        pytest.skip("psycopg2 is not installed (pip install -e '.[test]')")
    # not under pytest's tmp folder: that is private to root, and the server runs as postgres
    root = Path(tempfile.mkdtemp(prefix="depthplan-pg-"))
    data, sock = root / "data", root / "sock"
    sock.mkdir()
    as_user: list[str] = []
    if os.geteuid() == 0:   # initdb refuses to run as root: run the cluster as the postgres user
        if shutil.which("runuser") is None:
            pytest.skip("running as root without runuser: cannot start PostgreSQL as another user")
        shutil.chown(root, "postgres")
        shutil.chown(sock, "postgres")
        as_user = ["runuser", "-u", "postgres", "--"]
    port = _free_port()
    subprocess.run([*as_user, initdb, "-A", "trust", "-U", "postgres", "-D", str(data)], check=True,
                   capture_output=True)
    subprocess.run([*as_user, pg_ctl, "-w", "-D", str(data), "-l", str(root / "log"),
                    "-o", f"-h 127.0.0.1 -p {port} -k {sock}", "start"], check=True, capture_output=True)
    try:
        yield f"postgresql+psycopg2://postgres@127.0.0.1:{port}/postgres"
    finally:
        subprocess.run([*as_user, pg_ctl, "-D", str(data), "-m", "immediate", "stop"], capture_output=True)
        shutil.rmtree(root, ignore_errors=True)


def _env() -> dict[str, str]:
    return dict(os.environ, DEPTHPLAN_HEARTBEAT_S="1", DEPTHPLAN_GRACE_S="3")


def _depthplan(*args: str) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "depthplan", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=_env())


def _kill_one_worker_mid_cell(url: str, config: Path, out: Path) -> None:
    plan = _depthplan("run", str(config), "--out", str(out), "--storage", url, "--plan-only", "-q")
    _, err = plan.communicate(timeout=120)
    assert plan.returncode == 0, err
    store = SweepStore(url, "crash")
    assert store.counts()["waiting"] == 6
    workers = [_depthplan("worker", "--storage", url, "--study", "crash") for _ in range(2)]
    victim = f":{workers[0].pid}"
    deadline = time.time() + 120
    while not any(h.endswith(victim) for h in store.holders().values()) and time.time() < deadline:
        time.sleep(0.05)
    held = [cid for cid, h in store.holders().items() if h.endswith(victim)]
    assert held, "the first worker never claimed a cell"
    time.sleep(0.3)                          # mid-cell: a cell trains for a few seconds
    workers[0].send_signal(signal.SIGKILL)
    workers[0].communicate(timeout=30)
    out_text, err = workers[1].communicate(timeout=600)
    assert workers[1].returncode == 0, err
    collect = _depthplan("run", str(config), "--out", str(out), "--storage", url, "-q")
    stdout, err = collect.communicate(timeout=300)
    assert collect.returncode == 0, err
    counts = store.counts()
    assert counts["failed"] >= 1             # the killed worker's trial was failed by its stale heartbeat
    ids = [cid for cid, _ in store.completed_cells()]
    planned = [c.cell_id for c in plan_cells(load_config(config))]
    assert sorted(ids) == sorted(planned)    # every planned cell exactly once
    with (out / "runs.csv").open() as fh:
        runs = [(r["depth"], r["learning_rate"], r["seed"]) for r in csv.DictReader(fh)]
    assert len(runs) == 12 and len(set(runs)) == 12      # every (depth, rate, seed) run exactly once


def test_postgres_worker_killed_mid_cell(postgres_url: str, write_yaml, tmp_path: Path) -> None:
    _kill_one_worker_mid_cell(postgres_url, write_yaml(CONFIG), tmp_path / "res")


def test_embedded_store_worker_killed_mid_cell(write_yaml, tmp_path: Path) -> None:
    out = tmp_path / "res"
    out.mkdir()
    _kill_one_worker_mid_cell(local_url(out), write_yaml(CONFIG), out)
