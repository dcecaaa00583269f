"""Records that cross module lines: one seed run, and the table row it becomes.

Plain dataclasses with `to_dict`/`from_dict`, torch-free, so that the store,
the fitting code and the report can all read them without importing torch.
"""
from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass, field, fields
from enum import Enum
from pathlib import Path
from typing import Any, Mapping, Protocol, Sequence


class _Value(str, Enum):
    """A str enum that prints, formats and serialises as its value (as StrEnum does on 3.11+)."""

    def __str__(self) -> str:
        return str(self.value)

    def __format__(self, spec: str) -> str:
        return format(str(self.value), spec)


class RunStatus(_Value):
    """How a seed run ended. `censored` means the budget ran out first: the run's
    updates-to-convergence is a lower bound (T >= iterations), not a value."""

    CONVERGED = "converged"
    CENSORED = "censored"
    DIVERGED = "diverged"


class RateMode(_Value):
    """How a run's learning rate was chosen: given, tuned per depth, or a tuning trial."""

    FIXED = "fixed"
    TUNED = "tuned"
    TUNING = "tuning"


class ReversalStatus(_Value):
    """Whether T turns up with depth: seen within the swept depths, suspected past them, or not at all."""

    OBSERVED = "observed"
    BEYOND_RANGE = "beyond_range"
    NONE = "none"


#: The values of RunStatus, in order (the strings stored in runs.csv and fit.json).
STATUSES = tuple(s.value for s in RunStatus)


class _Rated(Protocol):
    lr_mode: str
    learning_rate: float


RateGroup = tuple[str, "float | None"]


def rate_group(run: _Rated) -> RateGroup:
    """The learning-rate curve a run (or planned cell) belongs to: ("tuned", None) or ("fixed", rate).

    The one rule every module uses: rates equal to 12 significant digits are the same curve
    (so a rate read back from CSV text matches the float it was written from).
    """
    if run.lr_mode == RateMode.TUNED:
        return (RateMode.TUNED.value, None)
    lr = run.learning_rate
    ok = isinstance(lr, (int, float)) and not isinstance(lr, bool) and math.isfinite(lr)
    return (RateMode.FIXED.value, float(f"{float(lr):.12g}") if ok else None)


def group_runs(runs: Sequence[Any]) -> dict[RateGroup, list[Any]]:
    """Runs by learning-rate curve (tuning trials left out), fixed rates in rising order, then tuned."""
    groups: dict[RateGroup, list[Any]] = {}
    for r in runs:
        if r.lr_mode != RateMode.TUNING:
            groups.setdefault(rate_group(r), []).append(r)
    order = sorted(groups, key=lambda k: (k[0] == RateMode.TUNED.value, k[1] if k[1] is not None else -1.0))
    return {k: groups[k] for k in order}


def primary_group(groups: Mapping[RateGroup, Sequence[Any]]) -> RateGroup:
    """The curve the headline describes: the rate tuned per depth when there is one (a fixed rate's
    slope includes the rate effect), else the fixed-rate curve with most runs, else the first."""
    keys = list(groups)
    if (RateMode.TUNED.value, None) in groups:
        return (RateMode.TUNED.value, None)
    fixed = [k for k in keys if k[0] == RateMode.FIXED.value]
    return max(fixed, key=lambda k: len(groups[k])) if fixed else keys[0]

#: Columns of `runs.csv`, in order. `iterations` is T for converged runs and
#: the number of updates done (the budget) for censored ones.
RUN_COLUMNS = (
    "depth", "width", "train_rows", "seed", "learning_rate", "lr_mode", "status", "iterations",
    "wall_seconds", "seconds_per_update", "final_train_loss", "final_train_accuracy",
    "validation_accuracy", "n_params", "activation", "init", "optimizer", "cell_id",
    "family", "model_options",
)


#: The per-layer probe series of a `RunResult`.
PROBE_SERIES = ("displacement", "snr_db", "information_xt", "information_ty")


@dataclass(frozen=True)
class RunResult:
    """What one seed run at one depth and learning rate measured."""

    depth: int
    width: int                      # width of the first hidden layer
    seed: int
    learning_rate: float
    status: RunStatus               # a str enum: compares equal to its value ("converged", ...)
    iterations: int                 # T if converged, updates done otherwise
    wall_seconds: float             # this seed's share of its cell's wall time
    seconds_per_update: float       # wall seconds per update of this seed
    final_train_loss: float
    final_train_accuracy: float
    validation_accuracy: float
    n_params: int
    train_rows: int = 0             # training rows this proxy saw (0: not recorded, the whole split)
    activation: str = ""
    init: str = ""
    optimizer: str = "sgd"
    lr_mode: RateMode = RateMode.FIXED   # fixed | tuned | tuning
    cell_id: str = ""
    family: str = "mlp"             # mlp | residual | conv | factory
    model_options: str = ""         # the family's own settings (ModelConfig.options_text)
    # curves: evaluation steps with the full-training-set loss at each
    eval_steps: tuple[int, ...] = ()
    train_loss: tuple[float, ...] = ()
    # probes: log-spaced steps ending at the run's last step; one list per layer (input side first).
    # displacement is at every probe step; the SNR and the information at `snr_steps`, a sparser
    # subset (empty in files written before it existed, whose SNR is at every probe step)
    probe_steps: tuple[int, ...] = ()
    displacement: tuple[tuple[float, ...], ...] = ()
    snr_db: tuple[tuple[float, ...], ...] = ()
    snr_steps: tuple[int, ...] = ()
    information_xt: tuple[tuple[float, ...], ...] = ()     # I(X;T) in bits, binned (`probes.information`)
    information_ty: tuple[tuple[float, ...], ...] = ()     # I(T;Y) in bits
    extra: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        # strings from CSV, JSON or callers become the enums; a value this version does not know
        # (a store written by another version) stays a string, and the fit leaves such runs out
        object.__setattr__(self, "status", _as_enum(RunStatus, self.status))
        object.__setattr__(self, "lr_mode", _as_enum(RateMode, self.lr_mode))

    @property
    def snr_probe_steps(self) -> tuple[int, ...]:
        """The steps of `snr_db` and the information series."""
        return self.snr_steps or self.probe_steps

    def series_steps(self, key: str) -> tuple[int, ...]:
        """The steps a probe series (`displacement`, `snr_db`, `information_xt`, ...) is measured at."""
        return self.probe_steps if key == "displacement" else self.snr_probe_steps

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (tuples become lists, NaN becomes None). `_jsonable` copies every
        container itself, so the fields are read directly (asdict's deep copy of the curves and
        probe series cost more than the rest of storing a run)."""
        return _jsonable({f.name: getattr(self, f.name) for f in fields(self)})

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "RunResult":
        """Inverse of `to_dict`; unknown keys are ignored."""
        names = {f.name for f in fields(cls)}
        kw = {k: v for k, v in d.items() if k in names}
        for key in ("eval_steps", "train_loss", "probe_steps", "snr_steps"):
            kw[key] = tuple(_num(v) for v in kw.get(key, ()) or ())
        for key in PROBE_SERIES:
            kw[key] = tuple(tuple(_num(v) for v in row) for row in kw.get(key, ()) or ())
        for key in ("final_train_loss", "final_train_accuracy", "validation_accuracy"):
            kw[key] = _num(kw.get(key))
        return cls(**kw)

    def row(self) -> dict[str, Any]:
        """The `runs.csv` row of this run."""
        d = self.to_dict()
        d["train_rows"] = d["train_rows"] or None      # not recorded: an empty cell
        return {c: d[c] for c in RUN_COLUMNS}


def _as_enum(kind: type[Enum], value: Any) -> Any:
    try:
        return kind(value)
    except ValueError:
        return value


def _num(v: Any) -> Any:
    return math.nan if v is None else v


def _jsonable(v: Any) -> Any:
    if isinstance(v, Enum):
        return v.value
    if isinstance(v, float):
        return v if math.isfinite(v) else None
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    return v


def write_bytes_atomic(path: Path, data: bytes) -> Path:
    """Write `data` to `path` through a temporary file, so a reader never sees half a file.

    The one writer behind every file the tool writes (exports, fit.json, config.yaml, the report
    and its figures).
    """
    path = Path(path)
    tmp = path.with_suffix(path.suffix + ".tmp")
    try:
        tmp.write_bytes(data)
        tmp.replace(path)
    except OSError as exc:  # name the file the user knows, not the temporary one
        raise OSError(exc.errno, exc.strerror or str(exc), str(path)) from exc
    finally:
        tmp.unlink(missing_ok=True)
    return path


def write_text_atomic(path: Path, text: str) -> Path:
    """`write_bytes_atomic` for UTF-8 text."""
    return write_bytes_atomic(path, text.encode("utf-8"))


def write_csv(path: Path, rows: list[dict[str, Any]], columns: tuple[str, ...]) -> Path:
    """Write rows (None as an empty cell) under a header of `columns`, atomically."""
    buf = io.StringIO(newline="")
    writer = csv.DictWriter(buf, fieldnames=columns)
    writer.writeheader()
    for row in rows:
        writer.writerow({k: ("" if v is None else v) for k, v in row.items()})
    return write_text_atomic(path, buf.getvalue())


def write_runs_csv(results: list[RunResult], path: Path) -> Path:
    """Write one row per seed run to `path` atomically and return it."""
    ordered = sorted(results, key=lambda r: (r.lr_mode, r.learning_rate, r.depth, r.seed))
    return write_csv(path, [r.row() for r in ordered], RUN_COLUMNS)


def write_runs_jsonl(results: list[RunResult], path: Path) -> Path:
    """Write one JSON object per seed run, curves and probes included, atomically."""
    lines = (json.dumps(r.to_dict(), allow_nan=False) + "\n" for r in results)
    return write_text_atomic(path, "".join(lines))


@dataclass(frozen=True)
class CellSpec:
    """One unit of work: the seeds of one depth and learning rate, trained as one batch."""

    depth: int
    seeds: tuple[int, ...]
    learning_rate: float
    lr_mode: RateMode = RateMode.FIXED   # fixed | tuned | tuning
    stop_after: int | None = None     # early-censoring budget below max_updates, if any
    width: int = 0                    # proxy size: hidden width of every layer (0: model.width)
    train_rows: int = 0               # proxy size: training rows drawn (0: the whole split)

    def __post_init__(self) -> None:
        object.__setattr__(self, "lr_mode", _as_enum(RateMode, self.lr_mode))

    @property
    def cell_id(self) -> str:
        """Stable id of the cell, from what it trains (used to skip finished work).

        A proxy size adds `W<width>-` and/or `N<rows>-` in front; cells of a sweep without size
        axes keep the ids they always had, so their stores stay resumable.
        """
        seeds = "-".join(str(s) for s in self.seeds)
        size = (f"W{self.width}-" if self.width else "") + (f"N{self.train_rows}-" if self.train_rows else "")
        return f"{size}K{self.depth}-lr{self.learning_rate:.6g}-{self.lr_mode}-s{seeds}"

    def to_dict(self) -> dict[str, Any]:
        d = {"depth": self.depth, "seeds": list(self.seeds), "learning_rate": self.learning_rate,
             "lr_mode": self.lr_mode.value, "stop_after": self.stop_after}
        d.update({k: v for k, v in (("width", self.width), ("train_rows", self.train_rows)) if v})
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "CellSpec":
        return cls(depth=int(d["depth"]), seeds=tuple(int(s) for s in d["seeds"]),
                   learning_rate=float(d["learning_rate"]), lr_mode=str(d.get("lr_mode", "fixed")),
                   stop_after=None if d.get("stop_after") is None else int(d["stop_after"]),
                   width=int(d.get("width") or 0), train_rows=int(d.get("train_rows") or 0))
