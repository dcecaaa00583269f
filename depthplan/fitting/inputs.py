"""Read measured runs for fitting: a results folder or a user's measurements table.

Two inputs, one code path. A results folder written by `depthplan run` holds
`runs.jsonl` (one `RunResult.to_dict()` object per line, with loss curves and
probes) and/or `runs.csv` (columns `records.RUN_COLUMNS`), and optionally
`sweep.json` (`eval_every`, `max_updates`, `name`). A measurements table is a
CSV file that a user wrote about their own jobs:

    depth,iterations[,seed][,status][,seconds_per_update][,learning_rate][,width][,train_rows]
        [,eval_every][,n_inputs,n_classes,batch_size]

With `width` (taken as the width of every hidden layer), `n_inputs`, `n_classes` and
`batch_size` on a row, the row records its network's shape (`extra["network"]`), from which
the fit counts the FLOPs of an update (`depthplan.fitting.cost`).

`status` is one of `converged|censored|diverged` (empty means converged); a
censored row's `iterations` is the budget it ran out of. `runs.csv` is read by
the same table reader, so both kinds of CSV are checked the same way. Every
problem is a `DataError` naming the file, line and column, for example
`timings.csv line 4, column iterations: must be a positive number, got 'abc'`.
Columns not listed here are ignored unless their name is close to one that is
(then it is taken for a typo and refused).
"""
from __future__ import annotations

import csv
import difflib
import json
import logging
import math
from dataclasses import fields
from pathlib import Path
from types import SimpleNamespace
from typing import Any, Callable, Mapping, Sequence

from ..errors import DataError
from ..records import RUN_COLUMNS, STATUSES, RateMode, RunResult, rate_group

log = logging.getLogger(__name__)

REQUIRED_COLUMNS = ("depth", "iterations")
_FIELD_NAMES = {f.name for f in fields(RunResult)}


def _positive_int(text: str) -> int:
    value = float(text)
    if not (math.isfinite(value) and value >= 1 and value == int(value)):
        raise ValueError("must be a whole number >= 1")
    return int(value)


def _int(text: str) -> int:
    value = float(text)
    if not (math.isfinite(value) and value == int(value)):
        raise ValueError("must be a whole number")
    return int(value)


def _positive_number(text: str) -> float:
    value = float(text)
    if not (math.isfinite(value) and value > 0):
        raise ValueError("must be a positive number")
    return value


def _nonnegative_number(text: str) -> float:
    value = float(text)
    if not (math.isfinite(value) and value >= 0):
        raise ValueError("must be a number >= 0")
    return value


def _number(text: str) -> float:
    return float(text)   # NaN and inf allowed: final losses of diverged runs


def _status(text: str) -> str:
    value = text.strip().lower()
    if value not in STATUSES:
        raise ValueError(f"must be one of {'|'.join(STATUSES)}")
    return value


def _lr_mode(text: str) -> str:
    value = text.strip().lower()
    if value not in ("fixed", "tuned"):
        raise ValueError("must be fixed or tuned")
    return value


#: More SGD updates than any run could take (10^15: about 30 years at a million updates a second);
#: a larger count is a unit or typing mistake, and its logarithm would dominate any fit.
MAX_ITERATIONS = 10**15


class _Refused(ValueError):
    """A cell that parses as a number but is not one its column can hold (message says why)."""


def _iterations(text: str) -> int:
    value = _positive_number(text)
    if value != int(value):
        raise _Refused("must be a whole number of updates")
    if value > MAX_ITERATIONS:
        raise _Refused("is more updates than any run takes (over 10^15); check the unit")
    return int(value)


# column -> (parser, message on failure, value when the cell is empty or absent)
_Spec = tuple[Callable[[str], Any], str, Any]
COLUMN_SPECS: dict[str, _Spec] = {
    "depth": (_positive_int, "must be a whole number >= 1", None),
    "iterations": (_iterations, "must be a positive number", None),
    "seed": (_int, "must be a whole number", None),
    "status": (_status, f"must be one of {'|'.join(STATUSES)}", "converged"),
    "seconds_per_update": (_positive_number, "must be a positive number", math.nan),
    "learning_rate": (_positive_number, "must be a positive number", math.nan),
    "width": (_positive_int, "must be a whole number >= 1", 0),
    "train_rows": (_positive_int, "must be a whole number >= 1", 0),
    "eval_every": (_positive_int, "must be a whole number >= 1", None),
    "n_inputs": (_positive_int, "must be a whole number >= 1", None),
    "n_classes": (_positive_int, "must be a whole number >= 1", None),
    "batch_size": (_positive_int, "must be a whole number >= 1", None),
    "lr_mode": (_lr_mode, "must be fixed or tuned", "fixed"),
    "wall_seconds": (_nonnegative_number, "must be a number >= 0", math.nan),
    "final_train_loss": (_number, "must be a number", math.nan),
    "final_train_accuracy": (_number, "must be a number", math.nan),
    "validation_accuracy": (_number, "must be a number", math.nan),
    "n_params": (_int, "must be a whole number", 0),
    "activation": (str, "", ""),
    "init": (str, "", ""),
    "optimizer": (str, "", "sgd"),
    "cell_id": (str, "", ""),
    "family": (str, "", "mlp"),
    "model_options": (str, "", ""),
}
assert set(RUN_COLUMNS) <= set(COLUMN_SPECS)


def _cell_error(where: str, column: str, message: str, raw: str) -> DataError:
    return DataError(f"{where}, column {column}: {message}, got {raw!r}")


def read_table(path: Path) -> list[RunResult]:
    """Read a measurements table (or a `runs.csv`) into run records.

    Args:
        path: CSV file with at least the columns `depth` and `iterations`.

    Returns:
        One `RunResult` per data row; fields the table does not carry are NaN,
        0 or "". A row's `eval_every`, when given, goes into `extra`.

    Raises:
        DataError: the file is missing, unreadable, lacks a required column, or
            a cell is not what its column needs (message names line and column).
    """
    path = Path(path)
    name = str(path)
    if not path.is_file():
        raise DataError(f"{name}: no such file")
    try:
        with path.open(newline="", encoding="utf-8-sig") as fh:
            reader = csv.reader(fh)
            header = next(reader, None)
            if header is None:
                raise DataError(f"{name}: empty file; expected a header line with columns "
                                f"{','.join(REQUIRED_COLUMNS)}")
            columns = [h.strip().lower() for h in header]
            _check_header(f"{name} line 1", columns)
            rows = []
            for cells in reader:
                if not any(c.strip() for c in cells):
                    continue
                rows.append(_parse_row(f"{name} line {reader.line_num}", columns, cells))
    except UnicodeDecodeError:
        raise DataError(f"{name}: not a text CSV file (it is not UTF-8)") from None
    except csv.Error as exc:
        raise DataError(f"{name}: not a readable CSV file ({exc})") from None
    if not rows:
        raise DataError(f"{name}: no data rows under the header")
    return _with_default_seeds(rows)


def _check_header(where: str, columns: list[str]) -> None:
    missing = [c for c in REQUIRED_COLUMNS if c not in columns]
    if missing:
        raise DataError(f"{where}: missing column{'s' if len(missing) > 1 else ''} "
                        f"{', '.join(missing)} (a table needs {','.join(REQUIRED_COLUMNS)}; "
                        f"it has {','.join(columns) or 'none'})")
    seen: set[str] = set()
    for col in columns:
        if col in seen:
            raise DataError(f"{where}: column {col} appears twice")
        seen.add(col)
        if col not in COLUMN_SPECS:
            close = difflib.get_close_matches(col, list(COLUMN_SPECS), n=1, cutoff=0.8)
            if close:
                raise DataError(f"{where}: unknown column {col!r} "
                                f"(did you mean {close[0]!r}?)")


def _parse_row(where: str, columns: list[str], cells: list[str]) -> dict[str, Any]:
    """One row's cells (text) checked against COLUMN_SPECS; `where` names the row in messages."""
    if len(cells) > len(columns) and any(c.strip() for c in cells[len(columns):]):
        raise DataError(f"{where}: {len(cells)} fields but the header has "
                        f"{len(columns)}")
    row: dict[str, Any] = {}
    for col, (parse, message, default) in COLUMN_SPECS.items():
        if col not in columns:
            row[col] = default
            continue
        i = columns.index(col)
        raw = cells[i].strip() if i < len(cells) else ""
        if raw == "":
            if col in REQUIRED_COLUMNS:
                raise _cell_error(where, col, f"{message} (the cell is empty)", raw)
            row[col] = default
            continue
        try:
            row[col] = parse(raw)
        except _Refused as exc:
            raise _cell_error(where, col, str(exc), raw) from None
        except ValueError:
            raise _cell_error(where, col, message, raw) from None
    return row


def _cell_text(value: Any) -> str:
    """A value from an in-memory column as the text a CSV cell would hold (missing -> empty)."""
    if value is None or type(value).__name__ in ("NAType", "NaTType"):
        return ""
    if isinstance(value, str):
        return value
    if hasattr(value, "item"):                    # numpy scalars
        value = value.item()
    if isinstance(value, float):
        return "" if math.isnan(value) else repr(value)
    return str(value)


def read_columns(columns: Mapping[str, Sequence[Any]], name: str = "table") -> list[RunResult]:
    """A measurements table given as equal-length columns (a DataFrame's, or a dict of arrays).

    Checked by the same rules as a CSV table (`read_table`); messages name the column and the row
    (counted from 0, as a DataFrame's position), e.g. `DataFrame row 3, column iterations: ...`.
    """
    names = [str(c).strip().lower() for c in columns]
    _check_header(name, names)
    cols = [list(v) for v in columns.values()]
    lengths = sorted({len(c) for c in cols})
    if len(lengths) > 1:
        sizes = ", ".join(f"{n} {len(c)}" for n, c in zip(names, cols))
        raise DataError(f"{name}: columns differ in length ({sizes}); a table needs one value per row in every column")
    if not lengths or lengths[0] == 0:
        raise DataError(f"{name}: no data rows")
    rows = [_parse_row(f"{name} row {i}", names, [_cell_text(c[i]) for c in cols]) for i in range(lengths[0])]
    return _with_default_seeds(rows)


def _with_default_seeds(rows: list[dict[str, Any]]) -> list[RunResult]:
    """Turn parsed rows into records, numbering missing seeds per depth from 0."""
    next_seed: dict[int, int] = {}
    runs = []
    for row in rows:
        if row["seed"] is None:
            row["seed"] = next_seed.get(row["depth"], 0)
        next_seed[row["depth"]] = max(next_seed.get(row["depth"], 0), row["seed"] + 1)
        eval_every = row.pop("eval_every")
        kw = {k: v for k, v in row.items() if k in _FIELD_NAMES}
        kw["extra"] = {} if eval_every is None else {"eval_every": eval_every}
        shape = [row.pop(k) for k in ("n_inputs", "n_classes", "batch_size")]
        if None not in shape and row["width"]:      # a table's width is every hidden layer's
            kw["extra"]["network"] = {"n_inputs": shape[0], "n_classes": shape[1],
                                      "widths": [row["width"]] * row["depth"], "batch_size": shape[2]}
        runs.append(RunResult(**kw))
    return runs


def read_jsonl(path: Path) -> list[RunResult]:
    """Read `runs.jsonl`: one `RunResult.to_dict()` object per line.

    A torn last line (a writer stopped mid-record) is skipped with a log
    message; a bad line anywhere else is a `DataError`.
    """
    path = Path(path)
    lines = path.read_text(encoding="utf-8").splitlines()
    runs = []
    for number, text in enumerate(lines, start=1):
        if not text.strip():
            continue
        try:
            d = json.loads(text)
            if not isinstance(d, dict):
                raise ValueError("not a JSON object")
            run = RunResult.from_dict(d)
        except (ValueError, TypeError) as exc:
            if number == len(lines):
                log.warning("%s line %d: skipping a torn last record (%s)", path, number, exc)
                continue
            raise DataError(f"{path} line {number}: not a run record ({exc})") from None
        _check_record(path, number, run)
        runs.append(run)
    return runs


def _check_record(path: Path, number: int, run: RunResult) -> None:
    checks = (
        ("depth", isinstance(run.depth, int) and run.depth >= 1, "must be a whole number >= 1"),
        ("iterations", isinstance(run.iterations, (int, float)) and run.iterations > 0,
         "must be a positive number"),
    )
    for key, ok, message in checks:
        if not ok:
            raise DataError(f"{path} line {number}, field {key}: {message}, "
                            f"got {getattr(run, key)!r}")


def read_sweep_info(folder: Path) -> dict[str, Any]:
    """The `sweep.json` of a results folder as a dict ({} when there is none)."""
    path = Path(folder) / "sweep.json"
    if not path.is_file():
        return {}
    try:
        info = json.loads(path.read_text(encoding="utf-8"))
    except ValueError as exc:
        raise DataError(f"{path}: not valid JSON ({exc})") from None
    return info if isinstance(info, dict) else {}


def load_runs(path: Path) -> list[RunResult]:
    """Load the runs to fit from a results folder or a measurements table.

    Args:
        path: a results folder (reads `runs.jsonl`, else `runs.csv`) or a CSV
            measurements table.

    Returns:
        The run records, in file order.

    Raises:
        DataError: the path does not exist, a file is malformed, or a results
            folder holds no finished runs yet.

    Example:
        >>> runs = load_runs(Path("results/digits"))  # doctest: +SKIP
    """
    path = Path(path)
    if not path.exists():
        raise DataError(f"{path}: no such file or folder")
    if path.is_dir():
        runs: list[RunResult] = []
        if (path / "runs.jsonl").is_file():
            runs = read_jsonl(path / "runs.jsonl")
        elif (path / "runs.csv").is_file():
            try:
                runs = read_table(path / "runs.csv")
            except DataError as exc:
                if "no data rows" not in str(exc):
                    raise
        if not runs:
            raise DataError(f"{path}: no finished runs yet; run `depthplan run CONFIG` first")
        return runs
    return read_table(path)


def network_from_config(folder: Path) -> dict[str, Any] | None:
    """The network's shape from a results folder's config.yaml, for runs that do not record it.

    Only where the config alone fixes the shape: the synthetic scenario (its `n_features` and
    `n_classes`); for other datasets the number of inputs comes from the data, and None is
    returned. None too when there is no readable config.yaml.
    """
    from ..config import load_config
    from ..errors import DepthplanError

    path = Path(folder) / "config.yaml"
    if not path.is_file():
        return None
    try:
        cfg = load_config(path)
    except DepthplanError:
        return None
    if cfg.data.source != "synthetic":
        return None
    width = cfg.model.width
    return {"n_inputs": cfg.data.n_features, "n_classes": cfg.data.n_classes,
            "width": width if isinstance(width, int) else None,
            "widths": None if isinstance(width, int) else list(width),
            "batch_size": cfg.train.batch_size}


def eval_interval(runs: list[RunResult], sweep_info: dict[str, Any] | None = None) -> int | None:
    """The coarsest evaluation interval the runs were measured with, if known.

    Taken from `sweep.json`'s `eval_every`, else the runs' `extra["eval_every"]`
    (table column), else the spacing of their recorded `eval_steps`.
    """
    if sweep_info and isinstance(sweep_info.get("eval_every"), (int, float)):
        return int(sweep_info["eval_every"])
    found = []
    for r in runs:
        if isinstance(r.extra.get("eval_every"), (int, float)):
            found.append(int(r.extra["eval_every"]))
        elif len(r.eval_steps) >= 2:
            steps = sorted(int(s) for s in r.eval_steps if isinstance(s, (int, float))
                           and math.isfinite(s))
            gaps = [b - a for a, b in zip(steps, steps[1:]) if b > a]
            if gaps:
                found.append(max(gaps))
    return max(found) if found else None


def runs_of_group(group: dict[str, Any] | None, runs: Sequence[RunResult]) -> list[RunResult]:
    """The runs a fit group describes (the curves of `records.rate_group`; tuning trials never)."""
    runs = [r for r in runs if r.lr_mode != RateMode.TUNING]
    if not group:
        return list(runs)
    want = rate_group(SimpleNamespace(lr_mode=group.get("lr_mode") or RateMode.FIXED.value,
                                      learning_rate=group.get("learning_rate")))
    if want == (RateMode.FIXED.value, None):        # a fixed group whose rate was not recorded
        return [r for r in runs if r.lr_mode != RateMode.TUNED]
    return [r for r in runs if rate_group(r) == want]
