"""The sweep store itself: opening a fresh store from several processes at once."""
from __future__ import annotations

import multiprocessing as mp
from pathlib import Path

from depthplan.sweep.storage import SweepStore, local_url


def _open(url: str, barrier, errors) -> None:
    barrier.wait()
    try:
        SweepStore(url, "race", create=True).counts()
    except Exception as exc:  # noqa: BLE001 - reported back to the test
        errors.put(f"{type(exc).__name__}: {exc}")


def test_processes_opening_a_fresh_store_together_all_succeed(tmp_path: Path) -> None:
    # Two workers (or a worker and a reader) starting on a new store both create the
    # schema; before the retry one of them failed with a UNIQUE constraint on the
    # schema-version table. Six processes released together by a barrier.
    ctx = mp.get_context("spawn")
    url = local_url(tmp_path)
    barrier, errors = ctx.Barrier(6), ctx.Queue()
    procs = [ctx.Process(target=_open, args=(url, barrier, errors)) for _ in range(6)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(120)
    found = [errors.get() for _ in range(errors.qsize())] if not errors.empty() else []
    assert found == [] and all(p.exitcode == 0 for p in procs)
