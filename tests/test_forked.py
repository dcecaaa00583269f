"""Tests of depthplan.forked: the per-size fits and the report's figures spread over forked processes.

The reference for every result is the plain loop in this process (DEPTHPLAN_SERIAL=1): a fork
changes where a piece runs, never what it returns. Whether a fork is unsafe with another thread
alive is the documented behaviour of POSIX fork (only the calling thread is copied), not ours.
"""
from __future__ import annotations

import os
import threading
import pytest

from depthplan import forked
from depthplan.forked import can_fork, fork_map

needs_two_cores = pytest.mark.skipif(not can_fork(), reason="needs two cores and fork")


def _square_and_pid(shared: int, item: int) -> tuple[int, int]:
    return shared + item * item, os.getpid()


def _boom(shared: None, item: int) -> int:
    if item == 2:
        raise ValueError(f"piece {item} failed")
    return item


@needs_two_cores
def test_pieces_run_in_other_processes_and_come_back_in_order():
    out = fork_map(_square_and_pid, range(8), shared=100)
    assert [v for v, _ in out] == [100 + i * i for i in range(8)]
    assert os.getpid() not in {pid for _, pid in out}          # computed by the children
    assert forked._SHARED is None                             # nothing kept alive after the map


def test_a_live_thread_or_the_switch_keeps_it_in_this_process(monkeypatch):
    stop = threading.Event()
    t = threading.Thread(target=stop.wait, daemon=True)
    t.start()
    try:
        assert not can_fork()
        assert {pid for _, pid in fork_map(_square_and_pid, range(4), shared=0)} == {os.getpid()}
    finally:
        stop.set()
        t.join()
    monkeypatch.setenv("DEPTHPLAN_SERIAL", "1")
    assert {pid for _, pid in fork_map(_square_and_pid, range(4), shared=0)} == {os.getpid()}


@pytest.mark.parametrize("serial", ["0", "1"])
def test_a_failing_piece_raises_its_own_error_here(monkeypatch, serial):
    monkeypatch.setenv("DEPTHPLAN_SERIAL", serial)
    with pytest.raises(ValueError, match="piece 2 failed"):
        fork_map(_boom, range(4))
