"""Invented runs for the fitting tests: seeded synthetic draws from a known law.

`sweep` draws runs at several widths from a broken stick whose corner moves as
K*(W) = 2 W^0.5 (`k_star`); tests/fitting/test_transfer.py, test_carry.py and the transfer
report tests in tests/reporting use it.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from depthplan.records import RunResult

ROOT = Path(__file__).resolve().parents[2]


def run(depth: int, iterations: float, status: str = "converged", *, seed: int = 0,
        lr: float = 0.1, lr_mode: str = "fixed", sec: float = math.nan, **extra) -> RunResult:
    """One invented run; keyword arguments set any other field (validation_accuracy, probes, ...)."""
    fields = dict(depth=int(depth), width=16, seed=seed, learning_rate=lr, status=status,
                  iterations=int(round(iterations)), wall_seconds=math.nan, seconds_per_update=sec,
                  final_train_loss=math.nan, final_train_accuracy=math.nan,
                  validation_accuracy=math.nan, n_params=0, lr_mode=lr_mode)
    return RunResult(**{**fields, **extra})


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


# ---------------------------------------------------------------- runs at several proxy sizes

DEPTHS = (2, 3, 4, 6, 8, 11, 16, 22, 32, 45, 64)


def k_star(width: float, a: float = 2.0, b: float = 0.5) -> float:
    return a * width ** b


def sweep(widths, *, slope=lambda w: -0.8, corner=k_star, rise=0.6, seeds=3, sd=0.05, seed=0, depths=DEPTHS):
    rng = np.random.default_rng(seed)
    runs = []
    for w in widths:
        s, ks = slope(w), corner(w)
        for k in depths:
            for i in range(seeds):
                log_t = math.log(20000) + s * math.log(k) + (rise - s) * max(0.0, math.log(k / ks)) + rng.normal(0, sd)
                runs.append(RunResult(depth=k, width=w, seed=i, learning_rate=0.1, status="converged",
                                      iterations=int(math.exp(log_t)), wall_seconds=1.0, seconds_per_update=math.nan,
                                      final_train_loss=0.1, final_train_accuracy=1.0, validation_accuracy=math.nan,
                                      n_params=0))
    return runs


# ---------------------------------------------------------------- runs with accuracy and a network

GUARD_DEPTHS = (1, 2, 3, 4, 6, 8, 12)


def law_runs(slope: float, *, accuracy=lambda k, rng: 0.9, lr: float = 0.1, lr_mode: str = "fixed",
             seed: int = 1, n_seeds: int = 4) -> list[RunResult]:
    """Invented runs: T = 20000 K^slope with 3 % noise at GUARD_DEPTHS, validation accuracy from
    `accuracy(K, rng)`, and the network's shape for the FLOP count (the accuracy and rate tests)."""
    rng = np.random.default_rng(seed)
    out = []
    for k in GUARD_DEPTHS:
        for s in range(n_seeds):
            t = 20000 * k ** slope * math.exp(rng.normal(0, 0.03))
            out.append(RunResult(depth=k, width=16, seed=s, learning_rate=lr, status="converged",
                                 iterations=int(t), wall_seconds=math.nan, seconds_per_update=math.nan,
                                 final_train_loss=0.1, final_train_accuracy=1.0,
                                 validation_accuracy=accuracy(k, rng), n_params=0, lr_mode=lr_mode,
                                 extra={"network": {"n_inputs": 400, "n_classes": 3, "batch_size": 16,
                                                    "widths": [16] * k}}))
    return out
