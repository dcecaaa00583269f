"""Invented runs for the fitting tests: seeded synthetic draws from a known law."""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from depthplan.records import RunResult

ROOT = Path(__file__).resolve().parents[2]


def run(depth: int, iterations: float, status: str = "converged", *, seed: int = 0,
        lr: float = 0.1, lr_mode: str = "fixed", sec: float = math.nan, **extra) -> RunResult:
    return RunResult(depth=int(depth), width=16, seed=seed, learning_rate=lr, status=status,
                     iterations=int(round(iterations)), wall_seconds=math.nan,
                     seconds_per_update=sec, final_train_loss=math.nan,
                     final_train_accuracy=math.nan, validation_accuracy=math.nan, n_params=0,
                     lr_mode=lr_mode, **extra)


def synthetic_runs(log_t, depths, n_seeds: int, sigma: float, rng, *, budget: float = math.inf,
                   **kw) -> list[RunResult]:
    """Invented runs: log T = log_t(K) + N(0, sigma^2), censored at `budget`."""
    out = []
    for k in depths:
        for s in range(n_seeds):
            t = math.exp(log_t(k) + rng.normal(0.0, sigma))
            out.append(run(k, min(t, budget), "censored" if t >= budget else "converged",
                           seed=s, **kw))
    return out


def power(c: float, s: float):
    return lambda k: math.log(c) + s * math.log(k)


def broken(c: float, s: float, r: float, k_break: float):
    return lambda k: (math.log(c) + s * math.log(k)
                      + (r - s) * max(math.log(k) - math.log(k_break), 0.0))


def arrays(runs):
    return (np.array([r.depth for r in runs], float), np.array([r.iterations for r in runs], float),
            np.array([r.status == "censored" for r in runs]))

