"""Spread independent, CPU-bound pieces of `fit` and `report` over the cores.

The per-size fits of a sweep and the report's figures are pure Python and numpy
work that holds the GIL, so threads do not help; forked processes do, and they
inherit the already-imported modules and the inputs, so a piece costs a fork
(milliseconds), not a fresh interpreter. `fork_map` falls back to a plain loop
whenever forking could be unsafe or cannot pay: one core, one piece, no `fork`
on this platform, another Python thread alive (a notebook, a heartbeat; a fork
copies only the calling thread, and a lock held elsewhere would stay held in
the child), or inside a daemonic process (a sweep's worker). Results are the
same either way: each piece is computed by the same function on the same input,
in the order given. Torch-free.
"""
from __future__ import annotations

import multiprocessing as mp
import os
import threading
from typing import Any, Callable, Sequence, TypeVar

__all__ = ["available_cores", "fork_map", "can_fork"]

T = TypeVar("T")
R = TypeVar("R")

_SHARED: Any = None          # what every piece reads; reaches the children through the fork, never pickled


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity), else the machine's count."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def can_fork() -> bool:
    """True when forking helper processes here is safe and may help."""
    return (available_cores() > 1 and "fork" in mp.get_all_start_methods()
            and threading.active_count() == 1 and not mp.current_process().daemon
            and os.environ.get("DEPTHPLAN_SERIAL", "") in ("", "0"))


def _call(task: tuple[Callable[[Any, Any], Any], Any]) -> Any:
    fn, item = task
    return fn(_SHARED, item)


def fork_map(fn: Callable[[Any, T], R], items: Sequence[T], shared: Any = None) -> list[R]:
    """[fn(shared, item) for item in items], over forked processes when `can_fork()`.

    `fn` must be a module-level function (it is sent by name); items and results are
    pickled, `shared` is not. An exception raised by a piece is raised here.
    Set DEPTHPLAN_SERIAL=1 to force the plain loop.
    """
    global _SHARED
    items = list(items)
    if len(items) < 2 or not can_fork():
        return [fn(shared, item) for item in items]
    from threadpoolctl import threadpool_limits

    _SHARED = shared
    try:
        # the cores are shared out by process: the children inherit one BLAS thread each (with
        # OpenBLAS's own pool of two per child, the per-size fits took longer than in one process)
        with threadpool_limits(1), mp.get_context("fork").Pool(min(available_cores(), len(items))) as pool:
            return pool.map(_call, [(fn, item) for item in items], chunksize=1)
    finally:
        _SHARED = None
