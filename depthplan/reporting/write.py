"""Write the hand-over report of a results folder or a measurements table.

`write_report(path)` fits first when `fit.json` is missing or stale, draws the
figures (`depthplan.figures`), and writes into the report folder:

    report.md      the report in Markdown; figures linked from figures/
    report.html    the same report, self-contained: figures embedded as data:
                   URIs, inline CSS, no script, no fetch (opens from an e-mail)
    figures/       every figure as PNG and SVG
    fit.json       the fit the report's numbers come from

The text is built once as a list of blocks (`depthplan.report_markup`; the
words come from `report_answer` and `report_tables`) and rendered to both
formats. Every number taken from fit.json is written as a reference into it,
so the HTML tags it with its key (`data-key`) and the tests can check that the
text says what the fit says. Torch-free.
"""
from __future__ import annotations

import csv
import json
import logging
import math
import shutil
from pathlib import Path
from typing import Any, Sequence

from ..errors import DataError, DepthplanError
from ..fit_record import FitResult, given
from ..fitting.assemble import SCHEMA, fit_path
from ..fitting.inputs import load_runs, read_sweep_info
from ..forked import fork_map
from ..records import write_text_atomic
from . import dynamics_figures as TF
from . import figures as F
from . import transfer_figures as XF
from .answer import answer_blocks, dynamics_words
from .inputs import ReportInputs
from .markup import Block, FigureFile, Words, to_html, to_markdown
from .transfer_words import headline_runs, lead_blocks, section_blocks
from .tables import (
    depth_table_blocks,
    fit_table_blocks,
    provenance_blocks,
    rate_blocks,
    rounds_blocks,
    tuning_blocks,
    warning_blocks,
)

log = logging.getLogger(__name__)

__all__ = ["write_report", "ensure_fit"]


# ---------------------------------------------------------------- fit.json: reuse or refit

def _stale_reason(fit_file: Path, inputs: Sequence[Path]) -> tuple[dict[str, Any] | None, str]:
    """(the stored fit, "") when it can be reused, else (None, why not)."""
    if not fit_file.is_file():
        return None, "there was none"
    try:
        fit = json.loads(fit_file.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None, "the stored one did not read as JSON"
    if not isinstance(fit, dict) or fit.get("schema") != SCHEMA:
        got = fit.get("schema") if isinstance(fit, dict) else None
        return None, f"the stored one has schema {got!r}, not {SCHEMA!r}"
    mtime = fit_file.stat().st_mtime_ns
    newer = [p.name for p in inputs if p.is_file() and p.stat().st_mtime_ns > mtime]
    if newer:
        return None, f"{', '.join(newer)} changed after the stored one was written"
    return fit, ""


def ensure_fit(path: Path, fit_file: Path, *, n_boot: int = 400) -> tuple[dict[str, Any], str]:
    """The fit of `path` from `fit_file`, refitted (and rewritten) when missing or stale.

    Stale means older than the runs (`runs.jsonl`/`runs.csv` of a folder, or
    the table itself) or written with another schema version.

    Returns:
        (the fit, a sentence saying whether it was reused or refitted and why).
    """
    path = Path(path)
    inputs = [path / "runs.jsonl", path / "runs.csv"] if path.is_dir() else [path]
    fit, why = _stale_reason(fit_file, inputs)
    if fit is not None:
        return fit, f"reused {fit_file.name}: it is newer than the runs"
    basis = _stored_cost_basis(fit_file)
    fit, _ = fit_path(path, fit_file, n_boot=n_boot, cost=basis)
    return fit, f"fitted now ({n_boot} bootstrap resamples) because {why}"


def _stored_cost_basis(fit_file: Path) -> str:
    """The cost basis a refit keeps: the stored fit's `planning.cost_basis` when it asked for
    seconds (`depthplan fit --cost seconds`), else the default, flops."""
    try:
        stored = json.loads(fit_file.read_text(encoding="utf-8"))
        return "seconds" if stored["planning"]["cost_basis"] == "seconds" else "flops"
    except (OSError, ValueError, KeyError, TypeError):
        return "flops"


# ---------------------------------------------------------------- reading the inputs

def _read_tuning(path: Path) -> list[dict[str, Any]]:
    """Rows of `tuning.csv` (depth, trial, learning_rate, objective, statuses); [] when absent."""
    if not path.is_file():
        return []
    rows = []
    with path.open(newline="", encoding="utf-8") as fh:
        for n, row in enumerate(csv.DictReader(fh), start=2):
            try:
                rows.append({"depth": int(row["depth"]), "trial": int(row["trial"]),
                             "learning_rate": float(row["learning_rate"]),
                             "objective": float(row["objective"]),
                             "statuses": (row.get("statuses") or "").split()})
            except (KeyError, TypeError, ValueError):
                log.warning("%s line %d: not a tuning trial row; left out", path, n)
    return [r for r in rows if r["learning_rate"] > 0 and r["objective"] > 0]


def _read_rounds(info: dict[str, Any]) -> list[dict[str, Any]]:
    """Adaptive rounds with their reasons, from sweep.json's `rounds`."""
    rounds = info.get("rounds")
    if not isinstance(rounds, list):
        return []
    return [r for r in rounds if isinstance(r, dict) and r.get("reason")]


def _read_config(folder: Path) -> tuple[Any, str]:
    path = folder / "config.yaml"
    if not path.is_file():
        return None, ""
    text = path.read_text(encoding="utf-8")
    try:
        from ..config import load_config

        return load_config(path), text
    except DepthplanError as exc:   # e.g. a data file moved since: keep the text, skip the details
        log.warning("%s: kept as text only (%s)", path, exc)
        return None, text


def read_inputs(path: Path, fit_file: Path, *, n_boot: int = 400) -> ReportInputs:
    """Load the fit (refitting when needed), the runs and the folder's side files."""
    path = Path(path)
    fit, note = ensure_fit(path, fit_file, n_boot=n_boot)
    runs = load_runs(path)
    if not path.is_dir():
        inp = ReportInputs(path, "table", fit, note, runs)
    else:
        info = read_sweep_info(path)
        config, text = _read_config(path)
        inp = ReportInputs(path, "results_folder", fit, note, runs, info, config, text,
                           _read_tuning(path / "tuning.csv"), _read_rounds(info))
    inp.every_size, inp.runs = inp.runs, headline_runs(inp.result, inp.runs)   # with proxy sizes: the size the headline describes
    return inp


# ---------------------------------------------------------------- figures

def _dynamics_depth(inp: ReportInputs) -> int | None:
    """The swept depth with probes nearest (on a log scale) to the depth to plan for."""
    probed = sorted({r.depth for r in inp.primary_runs if r.probe_steps and r.displacement})
    if not probed:
        return None
    target = inp.result.planning.recommended_depth or probed[-1]
    return min(probed, key=lambda k: (abs(math.log(k / target)), -k))


def _threshold(inp: ReportInputs) -> float | None:
    return None if inp.config is None else inp.config.train.converge_when.train_loss_below


_Drawn = tuple[Any, str, str, str, str]   # (Figure, name, title, caption, alt text)


def _scaling_figure(inp: ReportInputs) -> _Drawn:
    fit = inp.result
    fig, (ax,) = F.new_figure(7.2, 5.4)
    F.plot_scaling(fit, inp.runs, ax)
    F.shared_legend(fig, [ax], ncol=2)
    several = len(F.fitted_groups(fit)) > 1
    return (fig, "scaling", "Updates to convergence against depth",
            "Each small point is one seed run, spread sideways a little at its depth; an open "
            "triangle is a censored run (it had not converged when its budget ran out, so T is at "
            "least that), a cross on the top edge a diverged run. Squares are medians with bars from "
            "the first to the third quartile. The line is the fitted law, the band its 95 % bootstrap "
            "band, and the dashed vertical line with the grey span the reversal depth and its "
            "interval when one is observed. The star marks the depth to plan for"
            + ("; a dotted line is the law extrapolated beyond the swept depths, whose hatched "
               "region was not measured" if F.extrapolated_depths(fit) else "")
            + (". One colour, marker and line style per learning-rate group." if several else "."),
            "Log-log plot of SGD updates to convergence against the number of hidden layers, with "
            "every run, medians, the fitted law and the reversal depth.")


def _rates_figure(inp: ReportInputs) -> _Drawn | None:
    groups = F.fitted_groups(inp.result)
    if len(groups) < 2:
        return None
    fixed = [g for g in groups if g.group.lr_mode == "fixed"]
    n = len(groups) + bool(fixed)
    n_cols = 2 if n > 2 else n
    n_rows = math.ceil(n / n_cols)
    fig, axes = F.new_figure(7.4, 3.2 * n_rows + 0.8, n_cols, n_rows)
    for ax, g in zip(axes, groups):
        F.plot_scaling(g, inp.runs, ax, groups=[g], numbers_in_legend=False)
        pl = g.power_law
        ax.set_title(f"{F.group_label(g.group)}\ns = {pl.slope:.2f}"
                     + (f", α = {pl.alpha:.2f}" if given(pl.alpha) else "")
                     + (f", K* = {g.reversal.depth:.1f}" if g.reversal.depth else ""))
    if fixed:
        TF.plot_rate_product(inp.result, inp.runs, axes[n - 1])
    for ax in axes[n:]:
        ax.set_visible(False)
    F.shared_legend(fig, axes[:n])
    return (fig, "rates", "Learning-rate groups side by side",
            "One panel per learning-rate group, each with its own fitted law and slope"
            + ("; the last panel shows the median of T × learning rate × K per depth for the "
               "fixed-rate groups, which stays flat where depth acts as a rate multiplier."
               if fixed else "."),
            "Depth scaling per learning-rate group, side by side.")


def _cost_figure(inp: ReportInputs) -> _Drawn | None:
    if not TF.has_timings(inp.primary_runs):
        return None
    fig, axes = F.new_figure(7.6, 4.4, 2)
    TF.plot_seconds_per_update(inp.result, inp.primary_runs, axes[0])
    TF.plot_total_cost(inp.result, inp.primary_runs, axes[1])
    F.shared_legend(fig, axes)
    return (fig, "cost", "Cost per depth",
            _cost_caption(inp.result),
            "Seconds per update and total compute to convergence against depth.")


def _cost_caption(fit: FitResult) -> str:
    if fit.planning.cost_basis == "flops":
        return ("Left: measured wall-clock milliseconds per SGD update for each run, on this sweep's "
                "machine (shown, not used: it includes this machine's fixed overhead per update). "
                "Right: compute to converge for each run (updates × the analytic FLOP count of one "
                "update of the network as built), the fitted law times that count, and the "
                "compute-optimal depth with its interval (grey span).")
    return ("Left: measured wall-clock milliseconds per SGD update for each run, with the straight "
            "line the compute-optimal depth is computed from. Right: compute to converge for each "
            "run (updates × seconds per update), the fitted law times the cost line, and the "
            "compute-optimal depth with its interval (grey span). Timings are of the proxy "
            "networks on this sweep's machine.")


def _loss_figure(inp: ReportInputs) -> _Drawn | None:
    if not TF.representative_runs(inp.primary_runs):
        return None
    fig, (ax,) = F.new_figure(6.4, 3.9)
    TF.plot_loss_curves(inp.primary_runs, ax, threshold=_threshold(inp))
    return (fig, "loss", "Training loss per depth",
            "Training-set loss against SGD updates for one run per depth, the seed whose T is the "
            "median at that depth; darker lines are shallower networks.",
            "Training loss curves, one per depth, on log-log axes.")


def _dynamics_figure(inp: ReportInputs) -> _Drawn | None:
    depth = _dynamics_depth(inp)
    if depth is None:
        return None
    main = inp.primary_runs
    fig, axes = F.new_figure(8.6, 4.2, 2)
    TF.plot_displacement(inp.result, main, axes[0], depth=depth)
    TF.plot_snr(inp.result, main, axes[1], depth=depth)
    TF.layer_colourbar(fig, axes, min(len(r.displacement) for r in main
                                      if r.depth == depth and r.displacement))
    F.shared_legend(fig, axes)
    return (fig, "dynamics", f"Training dynamics per layer at K = {depth}",
            f"Median over seeds at each probe step, one line per layer of the K = {depth} network "
            "(the depth probed nearest to the depth to plan for). Left: distance of each weight "
            "matrix from its initial value, with guide lines of slope 1 (drift) and 1/2 (diffusion, "
            "the square-root law of a random walk). Right: gradient signal-to-noise ratio in "
            "decibels, 10·log10((‖ḡ‖² − S/n)/S) over n minibatch gradients (ḡ their mean, S the "
            "unbiased estimate of the noise's total variance); a gap is a step below the floor of "
            "the window. " + dynamics_words(inp.result, Words(inp.fit)),
            "Weight displacement and gradient SNR per layer against updates.")


def _depth_dynamics_figure(inp: ReportInputs) -> _Drawn | None:
    if not TF.has_depth_dynamics(inp.result):
        return None
    fig, axes = F.new_figure(8.6, 4.0, 2)
    TF.plot_snr_drop_by_depth(inp.result, axes[0])
    TF.plot_late_exponent_by_depth(inp.result, axes[1])
    F.shared_legend(fig, axes)
    return (fig, "dynamics-by-depth", "Training dynamics against depth",
            "Per depth, the median over layers and seeds of the probe measures, with bars over the "
            "spread between seed runs (each run's median over its layers; quartiles with four runs "
            "or more, minimum to maximum with fewer). Left: how far the gradient signal-to-noise "
            "ratio falls from its early level (first fifth of the probes) to its late level (last "
            "fifth), in decibels. Right: the log-log growth exponent of the weight displacement "
            "over the last half of each run (steps T/2 to T; after the transition in files written "
            "before that measure existed), against the guides 1 (drift) and 1/2 (diffusion) and "
            "α from the depth law with its 95 % interval. "
            + ((inp.result.diffusion.no_drop_note or "") if inp.result.diffusion else ""),
            "SNR drop and late displacement exponent against the number of hidden layers.")


def _information_figure(inp: ReportInputs) -> _Drawn | None:
    """The information plane at the dynamics depth, only when the runs carry the information probe."""
    depth = _dynamics_depth(inp)
    at = [r for r in inp.primary_runs if r.depth == depth]
    if depth is None or not TF.has_information(at):
        return None
    fig, (ax,) = F.new_figure(6.4, 4.4)
    TF.plot_information_plane(inp.primary_runs, ax, depth=depth)
    n_layers = min(len(r.information_xt) for r in at if r.information_xt)
    TF.layer_colourbar(fig, [ax], n_layers)
    bins = "the configured number of" if inp.config is None else f"{inp.config.probes.bins}"
    return (fig, "information", f"Information plane per layer at K = {depth}",
            f"Each layer's path through the plane of I(X;T), the information its binned output T "
            f"keeps about the input, and I(T;Y), about the label, at the SNR probe steps (median "
            f"over seeds; the output layer is its softmax). Binning estimator on a fixed batch of "
            f"training rows: each unit's output cut into {bins} equal-width bins over the layer's "
            "range at that step, each row's binned vector one symbol; I(X;T) = H(T) because T is a "
            "function of X. Such estimates depend on the bin count and the batch: once every row is "
            "its own symbol they read log2(rows) and H(Y) whatever the layer does (Saxe et al. "
            "2018, ICLR, \"On the information bottleneck theory of deep learning\").",
            "Paths of the hidden layers and the output in the information plane.")


def _tuning_figure(inp: ReportInputs) -> _Drawn | None:
    if not inp.tuning:
        return None
    fig, (ax,) = F.new_figure(6.4, 3.9)
    TF.plot_tuning(inp.tuning, ax)
    return (fig, "tuning", "Learning-rate tuning trials",
            "Each open marker is one tuning trial at one depth: its objective (the median T of "
            "the trial's seeds, censored and diverged runs penalised) against the rate tried; the "
            "filled marker is the rate the final seeds ran with.",
            "Tuning objective against learning rate, one series per depth.")


def _transfer_figure(inp: ReportInputs) -> _Drawn | None:
    if not XF.has_transfer_figure(inp.result):
        return None
    fig, axes = F.new_figure(8.6, 4.3, 2)
    for ax, quantity in zip(axes, ("reversal_depth", "slope")):
        XF.plot_transfer_panel(inp.result, ax, quantity)
        if ax.get_legend() is not None:
            ax.get_legend().remove()
    F.shared_legend(fig, axes, ncol=2)
    return (fig, "transfer", "The depth law against proxy size",
            "Left: the reversal depth K* of each proxy size (circles, 95 % bootstrap interval) against "
            "its size on log axes, with the fitted trend and the 95 % band of its prediction; right: "
            "the slope s the same way. Open diamonds are what the trend predicted for the held-out "
            "size before it trained, filled diamonds what it measured; the star is the target job, "
            "carried along the trend. The hatched field lies beyond the largest proxy in the fit: "
            "everything drawn there is extrapolated.",
            "Reversal depth and slope against proxy size, with the trend, the held-out check and the target.")


_FIGURES = (_scaling_figure, _rates_figure, _cost_figure, _loss_figure, _dynamics_figure,
            _depth_dynamics_figure, _information_figure, _tuning_figure, _transfer_figure)


def draw_figures(inp: ReportInputs, folder: Path) -> list[FigureFile]:
    """Draw every figure the inputs support and write each as PNG and SVG into `folder`."""
    shared = (inp, folder)
    return [f for f in fork_map(_draw_and_save, _FIGURES, shared=shared) if f is not None]   # one per core


def _draw_and_save(shared: tuple[ReportInputs, Path], draw: Any) -> FigureFile | None:
    """One figure drawn and written (a `fork_map` piece); None when the inputs do not support it."""
    inp, folder = shared
    drawn = draw(inp)
    if drawn is None:
        return None
    fig, name, title, caption, alt = drawn
    png, svg = F.save_figure(fig, folder, name)
    return FigureFile(name, title, caption, alt, png, svg)


# ---------------------------------------------------------------- the report

def build_blocks(inp: ReportInputs, figs: list[FigureFile]) -> list[Block]:
    """The report as blocks, in reading order."""
    w = Words(inp.fit)
    by_name = {f.name: f for f in figs}
    blocks: list[Block] = answer_blocks(inp, w)
    blocks[1:1] = lead_blocks(inp, w)            # after the heading: the held-out check, the target's depth

    def section(title: str, anchor: str, *names: str) -> None:
        blocks.append(("h", 2, title, anchor))
        for name in names:
            if name in by_name:
                blocks.append(("fig", by_name[name]))

    section("How depth changes the number of updates", "scaling", "scaling")
    blocks += fit_table_blocks(inp, w)
    transfer = section_blocks(inp, w)
    if transfer:
        section("From proxies to the target", "transfer", "transfer")
        blocks += transfer
    if "rates" in by_name or inp.result.lr_interaction:
        section("Learning rate and depth", "rates", "rates")
        blocks += rate_blocks(inp, w)
    if inp.tuning:
        section("Tuning trials", "tuning", "tuning")
        blocks += tuning_blocks(inp)
    if "cost" in by_name:
        section("Cost per depth", "cost", "cost")
    if "loss" in by_name or "dynamics" in by_name or "dynamics-by-depth" in by_name:
        section("Training dynamics", "dynamics", "loss", "dynamics", "dynamics-by-depth", "information")
    blocks.append(("h", 2, "Per depth", "per-depth"))
    blocks += depth_table_blocks(inp, w)
    if inp.rounds:
        blocks += rounds_blocks(inp)
    blocks += warning_blocks(inp, w)
    blocks += provenance_blocks(inp)
    return blocks


def _title(inp: ReportInputs) -> str:
    name = inp.info.get("name") or (inp.result.input and inp.result.input.sweep_name) or inp.path.stem
    return f"Depth plan: {name}"


def write_report(path: Path, out: Path | None = None, *, n_boot: int = 400) -> dict[str, Path | list[Path]]:
    """Write the hand-over report of a results folder or a measurements table.

    Args:
        path: a results folder (`depthplan run`) or a measurements CSV.
        out: the report folder; default the results folder itself, or
            `<table stem>-report/` beside a table.
        n_boot: bootstrap resamples when the fit has to be made (fit.json
            missing, older than the runs, or of another schema version).

    Returns:
        {"md": report.md, "html": report.html, "fit": fit.json in the report
        folder, "figures": [every PNG and SVG written]}.

    Raises:
        DataError: the input cannot be read or fitted (see `depthplan.fitting`).

    Example:
        >>> paths = write_report(Path("results/demo"))  # doctest: +SKIP
    """
    path = Path(path)
    if not path.exists():
        raise DataError(f"{path}: no such file or folder")
    folder = path if path.is_dir() else path.with_name(f"{path.stem}-report")
    out = Path(out) if out is not None else folder
    out.mkdir(parents=True, exist_ok=True)
    fit_file = path / "fit.json" if path.is_dir() else out / "fit.json"
    inp = read_inputs(path, fit_file, n_boot=n_boot)
    report_fit = out / "fit.json"
    if report_fit.resolve() != fit_file.resolve():
        shutil.copyfile(fit_file, report_fit)
    fig_dir = out / "figures"
    figs = draw_figures(inp, fig_dir)
    blocks = build_blocks(inp, figs)
    title = _title(inp)
    md, html_path = out / "report.md", out / "report.html"
    write_text_atomic(md, to_markdown(blocks, inp.fit, title, fig_dir.name))
    write_text_atomic(html_path, to_html(blocks, inp.fit, title))
    return {"md": md, "html": html_path, "fit": report_fit,
            "figures": [p for f in figs for p in (f.png, f.svg)]}
