"""Decide from evaluated metrics alone whether, and why, a run stops.

Plain Python, no torch: tests drive it with hand-written sequences.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from ..config import ConvergeConfig


@dataclass(frozen=True)
class Criterion:
    """All given conditions must hold at one evaluation for a run to count as converged."""

    train_loss_below: float | None = None
    train_accuracy_at_least: float | None = None
    validation_accuracy_at_least: float | None = None

    @classmethod
    def from_config(cls, cfg: ConvergeConfig) -> "Criterion":
        return cls(cfg.train_loss_below, cfg.train_accuracy_at_least, cfg.validation_accuracy_at_least)

    @property
    def needs_validation(self) -> bool:
        return self.validation_accuracy_at_least is not None

    def met(self, train_loss: float, train_accuracy: float = math.nan,
            validation_accuracy: float = math.nan) -> bool:
        checks = []
        if self.train_loss_below is not None:
            checks.append(train_loss < self.train_loss_below)
        if self.train_accuracy_at_least is not None:
            checks.append(train_accuracy >= self.train_accuracy_at_least)
        if self.validation_accuracy_at_least is not None:
            checks.append(validation_accuracy >= self.validation_accuracy_at_least)
        return bool(checks) and all(checks)


def verdict(criterion: Criterion, step: int, max_updates: int, train_loss: float,
            train_accuracy: float = math.nan, validation_accuracy: float = math.nan) -> str | None:
    """How a run ends at this evaluation, or None if it goes on.

    Returns one of "diverged" (non-finite loss), "converged" (criterion met),
    "censored" (the budget is spent without convergence), or None.
    """
    if not math.isfinite(train_loss):
        return "diverged"
    if criterion.met(train_loss, train_accuracy, validation_accuracy):
        return "converged"
    if step >= max_updates:
        return "censored"
    return None


def updates_to_converge(losses: list[float], eval_every: int, max_updates: int,
                        criterion: Criterion) -> tuple[int, str]:
    """Count updates to convergence from losses evaluated after eval_every, 2*eval_every, ... updates.

    Returns:
        (T, status): the first evaluation step whose loss meets the criterion and
        "converged"; otherwise the last step evaluated and "censored" or "diverged".
    """
    step = 0
    for loss in losses:
        step += eval_every
        v = verdict(criterion, step, max_updates, loss)
        if v is not None:
            return step, v
    return step, "censored"
