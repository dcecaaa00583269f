"""depthplan: measure how depth changes updates-to-convergence, fit the law, plan the depth.

The Python interface (docs/python-api.md):

    >>> import depthplan
    >>> result = depthplan.fit("timings.csv")            # doctest: +SKIP
    >>> result.planning.recommended_depth                 # doctest: +SKIP

`fit`, `run`, `read_runs`, `report` and `FitResult` are the public API (`__all__`), with the
errors they raise and the sweep-file reader. They load lazily, so `import depthplan` and
`depthplan.fit` never import torch (nor matplotlib, until a figure is drawn).
"""
from __future__ import annotations

import warnings
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
from .records import RunResult

_API = ("fit", "run", "read_runs", "report", "FitResult")
# internal names the top level exposed before the Python API; they keep working for one release
_MOVED = {"train_cell": "train.loop", "train_plain": "train.reference", "run_sweep": "sweep.run",
          "plan_cells": "sweep.run", "load_dataset": "train.datasets", "fit_runs": "fitting",
          "fit_path": "fitting", "load_runs": "fitting", "write_report": "reporting",
          "CellSpec": "records"}

__all__ = ["__version__", *_API, "RunResult", "SweepFile", "load_config", "DepthplanError", "ConfigError",
           "DataError", "StoreError", "RunFailed", "ConvergenceWarning"]


def __getattr__(name: str) -> Any:
    import importlib

    if name in _API:
        return getattr(importlib.import_module(".api", __name__), name)
    if name in _MOVED:
        where = f"depthplan.{_MOVED[name]}"
        warnings.warn(f"depthplan.{name} is internal and leaves the top level in the next release; "
                      f"import it from {where}", DeprecationWarning, stacklevel=2)
        return getattr(importlib.import_module(where), name)
    raise AttributeError(f"module 'depthplan' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
