"""Stuck runs: censored runs far beyond what their depth's other runs took.

A run censored at its budget is a lower bound on T, and the censored
likelihood treats it as a run that was merely slow. That is wrong for a run
that got stuck (a seed that never trains, a dead start): one such run among
converged siblings drags the whole law. The rule, applied per depth:

    a censored run is `stuck` when at least `MIN_CONVERGED` (2) runs at its
    depth converged and its budget exceeds `STUCK_FACTOR` (3) times the
    largest T among them.

With log-normal seed scatter of 0.3 in log T (a wide spread for seeds of one
depth), 3 times the slowest of two or more siblings lies about 3.7 standard
deviations above them, so a run that was merely slow, censored near where its
siblings finished, stays a censored observation. A depth with fewer than two
converged runs gives no basis, and its censored runs stay censored. Stuck
runs are left out of every T fit and counted per depth as a stuck rate.
"""
from __future__ import annotations

from typing import Sequence

from ..records import RunResult

STUCK_FACTOR = 3.0     # budget over the slowest converged sibling beyond which a run is stuck
MIN_CONVERGED = 2      # converged runs a depth needs before any of its runs is called stuck


def find_stuck(runs: Sequence[RunResult]) -> list[RunResult]:
    """The censored runs the rule above classes as stuck, in input order.

    Args:
        runs: one learning-rate group's runs (any statuses).

    Returns:
        The stuck runs (the same objects), in the order given.
    """
    slowest: dict[int, float] = {}
    count: dict[int, int] = {}
    for r in runs:
        if r.status == "converged":
            slowest[r.depth] = max(slowest.get(r.depth, 0.0), float(r.iterations))
            count[r.depth] = count.get(r.depth, 0) + 1
    return [r for r in runs if r.status == "censored" and count.get(r.depth, 0) >= MIN_CONVERGED
            and r.iterations > STUCK_FACTOR * slowest[r.depth]]
