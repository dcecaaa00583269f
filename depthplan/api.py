"""The Python interface: what a notebook or a pipeline calls instead of the command line.

Five functions and one result type, re-exported by `depthplan` itself:

- `fit(data)`: fit the depth law to a results folder, a measurements CSV, a pandas DataFrame or a
  mapping of equal-length columns; returns a `FitResult` (the same numbers `depthplan fit` writes).
- `run(config)`: train a sweep from a YAML path or a mapping with the same keys.
- `read_runs(path)`: the runs of a folder or table as a pandas DataFrame (the runs.csv columns).
- `report(path)`: write the Markdown/HTML report of a results folder or table.
- `FitResult`: fit.json as typed attributes, with `summary()`, `plot()` and a notebook view.

This module sits beside the CLI on the top floor: it may use every wing, and imports each one only
when a function needs it, so `import depthplan` stays free of torch and matplotlib. pandas is
optional (`pip install depthplan[notebook]`); only DataFrame output needs it.
"""
from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping

from .errors import DataError, DepthplanError
from .fit_record import FitResult as _FitRecord

if TYPE_CHECKING:  # pragma: no cover - typing only
    from matplotlib.axes import Axes

    from .sweep.run import SweepSummary

__all__ = ["FitResult", "fit", "run", "read_runs", "report"]


class FitResult(_FitRecord):
    """fit.json as a frozen record: `r.power_law.slope`, `r.planning.recommended_depth`, `r.warnings`...

    `to_dict()` is the fit.json content (key for key); `FitResult.from_dict(json.load(f))` reads one.
    """

    def summary(self) -> str:
        """The text `depthplan fit` prints: the law, the reversal, the depth to plan for, the warnings."""
        from .fitting.summary import format_summary

        return format_summary(self)

    def plot(self, ax: Axes | None = None) -> Axes:
        """Draw the scaling figure (T against K on log-log axes: medians, the fitted model and its
        band, the planned depth) onto `ax`, or onto a new Figure's Axes. Returns the Axes.

        Uses no pyplot state: the figure is a bare `matplotlib.figure.Figure`.
        """
        from .reporting.figures import new_figure, plot_scaling

        if ax is None:
            ax = new_figure()[1][0]
        plot_scaling(self, [], ax)
        return ax

    def _repr_html_(self) -> str:
        from .reporting.notebook import fit_html

        return fit_html(self)


def _pandas(why: str) -> Any:
    try:
        import pandas
    except ImportError:
        raise DepthplanError(f"{why} needs pandas: pip install 'depthplan[notebook]'") from None
    return pandas


def _runs_of(data: Any) -> tuple[list, str, str, dict[str, Any]]:
    """(runs, source, kind, sweep info) for anything `fit` accepts."""
    from .fitting.inputs import load_runs, read_columns, read_sweep_info

    if isinstance(data, (str, Path)):
        path = Path(data)
        info = read_sweep_info(path) if path.is_dir() else {}
        return load_runs(path), str(path), "results_folder" if path.is_dir() else "table", info
    if type(data).__name__ == "DataFrame" and hasattr(data, "columns"):
        columns = {str(c): data[c].tolist() for c in data.columns}
        return read_columns(columns, "DataFrame"), "DataFrame", "table", {}
    if isinstance(data, Mapping):
        return read_columns(data, "table"), "table", "table", {}
    raise DataError(f"fit: data must be a results folder, a CSV path, a DataFrame or a mapping of "
                    f"columns, got {type(data).__name__}")


def fit(data: Any, *, bootstrap: int = 400, seed: int = 0, save_fraction: float = 0.05, cost: str = "flops",
        target_width: int | None = None, target_rows: int | None = None) -> FitResult:
    """Fit the depth law, the reversal and the planning figures.

    Args:
        data: a results folder or measurements CSV (as `depthplan fit` takes), a pandas DataFrame,
            or a mapping of equal-length columns: `depth`, `iterations`, and optionally `seed`,
            `status` (converged | censored | diverged), `seconds_per_update`, `learning_rate`,
            `lr_mode`, `width`, `validation_accuracy`, ...
        bootstrap: bootstrap replicates for the intervals.
        seed: seed of the bootstrap.
        save_fraction: a layer is worth adding while it saves at least this fraction of T.
        cost: the cost of one update for the compute-optimal depth: "flops" (counted for the
            network as built) or "seconds" (this machine's measured seconds per update), as
            `depthplan fit --cost`.
        target_width, target_rows: the job to plan for; with runs at two or more proxy sizes
            (`width`, `train_rows` columns) `result.transfer.target` carries the law to it.

    Returns:
        The fit, equal to what `depthplan fit` writes to fit.json for the same data. Nothing is
        written to disk.

    Raises:
        DataError: unreadable data, a bad cell (named by column and row), or too few depths.

    Example:
        >>> import depthplan
        >>> r = depthplan.fit({"depth": [2, 4, 8, 16] * 3,
        ...                    "iterations": [4000, 2050, 1010, 520, 4100, 1980, 990, 505,
        ...                                   3900, 2010, 1020, 498]}, bootstrap=100)
        >>> round(r.power_law.slope, 1)
        -1.0
    """
    from .fitting.assemble import fit_loaded

    runs, source, kind, info = _runs_of(data)
    target = {"width": target_width, "train_rows": target_rows}
    result = fit_loaded(runs, source=source, kind=kind, info=info, save_fraction=save_fraction,
                        n_boot=bootstrap, seed=seed, cost=cost, target=target if any(target.values()) else None,
                        folder=Path(data) if kind == "results_folder" else None)
    return FitResult.from_dict(result)


def run(config: str | Path | Mapping[str, Any], *, out: str | Path | None = None, workers: int | None = None,
        storage: str | None = None, progress: bool = True) -> SweepSummary:
    """Train a sweep: every cell not stored yet, then export runs.csv (as `depthplan run` does).

    Args:
        config: a YAML sweep file, or a mapping with the same keys (checked by the same code,
            with the same messages; relative data paths are taken from the working directory).
        out: the results folder (default as the CLI: `output.dir`, or `results/<name>`).
        workers: local worker processes (default as `depthplan run`).
        storage: a storage URL (default: SQLite in the folder).
        progress: draw a progress bar on stderr.

    Raises:
        ConfigError: a bad key or value, named by its path (`sweep.depths[2]: ...`).
    """
    from .config import load_config, parse_config
    from .sweep.run import run_sweep

    if isinstance(config, Mapping):
        cfg = parse_config(dict(config), base_dir=Path.cwd(), where="config")
    else:
        cfg = load_config(config)
    chosen = {} if workers is None else {"workers": workers}
    return run_sweep(cfg, out=out, storage=storage, show_progress=progress, **chosen)


def read_runs(path: str | Path) -> Any:
    """The runs of a results folder or measurements table as a pandas DataFrame, one row per run,
    with the runs.csv columns (`depthplan.records.RUN_COLUMNS`) in order."""
    from .fitting.inputs import load_runs
    from .records import RUN_COLUMNS

    pandas = _pandas("read_runs")
    rows = [r.row() for r in load_runs(Path(path))]
    return pandas.DataFrame(rows, columns=list(RUN_COLUMNS))


def report(path: str | Path, out: str | Path | None = None) -> Path:
    """Write the report (Markdown, self-contained HTML, figures) of a results folder or table.

    Returns:
        The HTML file's path.
    """
    from .reporting.write import write_report

    paths = write_report(Path(path), Path(out) if out is not None else None)
    return Path(paths["html"])
