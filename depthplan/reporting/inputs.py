"""What a report is written from: one record shared by the report's text modules."""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

from ..fit_record import FitResult
from ..fitting.inputs import runs_of_group
from ..records import RunResult

__all__ = ["ReportInputs"]


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

    @cached_property
    def result(self) -> FitResult:
        """The fit as a typed record (`fit` stays the dict: number references name its paths)."""
        return FitResult.from_dict(self.fit)

    @property
    def primary_runs(self) -> list[RunResult]:
        return runs_of_group(self.fit.get("group"), self.runs)
