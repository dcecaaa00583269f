"""depthplan: measure how depth changes updates-to-convergence, fit the law, plan the depth.

The base (config, records, errors) imports eagerly; the trainer is reached lazily through `__getattr__`, so
`import depthplan.fitting` never loads torch.
"""
from __future__ import annotations

from typing import Any

__version__ = "0.1.0"

from .config import SweepFile, load_config
from .errors import (
    ConfigError,
    ConvergenceWarning,
    DataError,
    DepthplanError,
    RunFailed,
    StoreError,
)
from .records import CellSpec, RunResult

_LAZY = {"train_cell": "train.loop", "train_plain": "train.reference", "run_sweep": "sweep.run",
         "plan_cells": "sweep.run", "load_dataset": "train.datasets", "fit_runs": "fitting",
         "fit_path": "fitting", "load_runs": "fitting", "write_report": "reporting"}

__all__ = ["__version__", "SweepFile", "load_config", "CellSpec", "RunResult", "DepthplanError",
           "ConfigError", "DataError", "StoreError", "RunFailed", "ConvergenceWarning", *_LAZY]


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'depthplan' has no attribute {name!r}")
