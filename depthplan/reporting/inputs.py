"""What a report is written from: one record shared by the report's text modules."""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any, Sequence

from ..fit_record import FitGroup, FitResult
from ..fitting.inputs import runs_of_group
from ..records import RunResult

__all__ = ["ReportInputs", "group_runs"]


def group_runs(g: FitGroup, runs: Sequence[RunResult]) -> list[RunResult]:
    """The runs the rate group of `g` describes (all of them when it names none)."""
    return runs_of_group(g.group.to_dict() if g.group else None, runs)


@dataclass
class ReportInputs:
    """Everything a report is written from."""

    path: Path                       # the results folder or table given
    kind: str                        # results_folder | table
    fit: dict[str, Any]
    fit_note: str                    # how fit.json came about (reused / refitted and why)
    runs: list[RunResult]
    info: dict[str, Any] = field(default_factory=dict)        # sweep.json
    config: Any = None                                        # SweepFile, when config.yaml reads
    config_text: str = ""
    tuning: list[dict[str, Any]] = field(default_factory=list)
    rounds: list[dict[str, Any]] = field(default_factory=list)
    every_size: list[RunResult] = field(default_factory=list)   # with proxy sizes: the runs of all of them

    @cached_property
    def result(self) -> FitResult:
        """The fit as a typed record (`fit` stays the dict: number references name its paths)."""
        return FitResult.from_dict(self.fit)

    @property
    def primary_runs(self) -> list[RunResult]:
        return group_runs(self.result, self.runs)
