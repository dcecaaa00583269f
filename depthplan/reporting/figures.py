"""The report's figures, each drawn by a small function onto Axes it is given: the depth law.

Every `plot_*` function takes the fit (a `FitResult`, or one `FitGroup` of it) and/or run
records and draws onto `ax`, returning the artists it added; nothing here
touches pyplot's global state, and `save_figure` writes a Figure as PNG and
SVG. The figures of cost, loss curves, probes and learning rates live in
`depthplan.training_figures` and share this style: colours from the Okabe-Ito
palette (distinguishable with the common colour-vision deficiencies), ordered
series (depths, layers) on the cividis map, whose lightness rises steadily,
and every series also differs in marker or line style, so the figures stay
readable printed in greyscale.
"""
from __future__ import annotations

import io
import math
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from matplotlib import colormaps, rc_context
from matplotlib.artist import Artist
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter, NullLocator

from ..fit_record import FitGroup, FitResult, GroupLabel, given
from ..records import RunResult, write_bytes_atomic
from .inputs import group_runs

# Okabe-Ito: black, orange, sky blue, bluish green, yellow, blue, vermillion, reddish purple
OKABE_ITO = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7")
_, ORANGE, SKY_BLUE, GREEN, _YELLOW, BLUE, VERMILLION, PURPLE = OKABE_ITO
GREY = "#7f7f7f"
# group styles: colour, marker, line style (no yellow: too pale on white)
GROUP_STYLES = ((BLUE, "o", "-"), (VERMILLION, "s", "--"), (GREEN, "D", "-."),
                (PURPLE, "^", ":"), (ORANGE, "v", (0, (5, 1, 1, 1))))
LINE_STYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (1, 1)))
MARKERS = ("o", "s", "D", "^", "v", "P", "X", "*")
RC = {"font.size": 9, "axes.titlesize": 9.5, "axes.labelsize": 9, "legend.fontsize": 7.5,
      "legend.framealpha": 0.92, "axes.spines.top": False, "axes.spines.right": False,
      "axes.grid": True, "grid.color": "#d9d9d9", "grid.linewidth": 0.5,
      "svg.hashsalt": "depthplan", "savefig.dpi": 150}
_CMAP = colormaps["cividis"]


def ordered_colour(i: int, n: int) -> tuple[float, ...]:
    """The i-th of n colours of an ordered series (dark blue to olive; the palest end is left out)."""
    return _CMAP(0.0 if n <= 1 else 0.8 * i / (n - 1))


def new_figure(width: float = 7.0, height: float = 4.0, n_cols: int = 1, n_rows: int = 1, *,
               sharey: bool = False) -> tuple[Figure, list[Axes]]:
    """A Figure (no pyplot) with a grid of Axes in the report's style, listed row by row."""
    with rc_context(RC):
        fig = Figure(figsize=(width, height), layout="constrained")
        axes = fig.subplots(n_rows, n_cols, sharey=sharey, squeeze=False)
    return fig, [ax for row in axes for ax in row]


def save_figure(fig: Figure, folder: Path, name: str) -> tuple[Path, Path]:
    """Write `fig` as `<folder>/<name>.png` and `.svg` and return both paths."""
    folder.mkdir(parents=True, exist_ok=True)
    png, svg = folder / f"{name}.png", folder / f"{name}.svg"
    png_bytes, svg_bytes = io.BytesIO(), io.BytesIO()
    with rc_context(RC):
        # "tight": the whole of a legend placed outside the axes is kept
        fig.savefig(png_bytes, format="png", dpi=RC["savefig.dpi"], bbox_inches="tight", pad_inches=0.06,
                    metadata={"Software": None})
        fig.savefig(svg_bytes, format="svg", bbox_inches="tight", pad_inches=0.06,
                    metadata={"Date": None, "Creator": None})
    return write_bytes_atomic(png, png_bytes.getvalue()), write_bytes_atomic(svg, svg_bytes.getvalue())


# ---------------------------------------------------------------- shared helpers

def group_label(group: GroupLabel | None) -> str:
    """Short words for a rate group: 'fixed rate 0.02', 'rate tuned per depth'."""
    if not group or not group.to_dict():
        return "all runs"
    if group.lr_mode == "tuned":
        return "rate tuned per depth"
    lr = group.learning_rate
    return "rate not recorded" if not given(lr) else f"fixed rate {lr:g}"


def fitted_groups(fit: FitGroup) -> list[FitGroup]:
    """The rate groups that were fitted (the top level alone when there is one group)."""
    return fit.groups if isinstance(fit, FitResult) else [fit]


def _law_curve(g: FitGroup, depths: Sequence[float]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    from ..fitting.assemble import power_law_curve

    return power_law_curve({"power_law": g.power_law.to_dict()}, depths)


def _number(v: float) -> str:
    return f"{v:,.0f}" if v >= 1000 else f"{v:g}"


def log_axis_numbers(axis: Any) -> None:
    """Log axis labelled in plain numbers (1, 2, 5, 10 ... or 1, 10, 100 over a wide range)."""
    lo, hi = sorted(axis.get_view_interval())
    wide = lo > 0 and math.log10(hi / lo) > 2.2
    axis.set_major_locator(LogLocator(base=10, subs=(1.0,) if wide else (1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda v, _: _number(v)))
    axis.set_minor_formatter(NullFormatter())


def _depth_axis(ax: Axes, depths: Sequence[float], *, log: bool = True) -> None:
    """Depth on x with a tick at the swept depths (thinned where they crowd)."""
    depths = sorted({int(k) for k in depths})
    if log:
        ax.set_xscale("log")
    ticks: list[int] = []
    for k in depths:
        gap = math.log(k / ticks[-1]) if log and ticks else (k - ticks[-1] if ticks else math.inf)
        if not ticks or gap >= (0.12 if log else max(1, (depths[-1] - depths[0]) / 14)):
            ticks.append(k)
    ax.set_xticks(ticks)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xlabel("hidden layers K")


def depth_panel(ax: Axes, depths: Sequence[float], ylabel: str, title: str = "", *,
                log: bool = True) -> None:
    """Finish a panel drawn against depth: depth ticks, T-like y axis (log unless told), labels, legend."""
    _depth_axis(ax, depths, log=log)
    if log:
        ax.set_yscale("log")
        log_axis_numbers(ax.yaxis)
    ax.set_ylabel(ylabel)
    if title:
        ax.set_title(title)
    if ax.get_legend() is None:
        ax.legend(loc="best")


def labelled(artists: Sequence[Artist]) -> list[Artist]:
    """The artists that carry a legend label, in drawing order, each label once."""
    seen: dict[str, Artist] = {}
    for a in artists:
        label = a.get_label()
        if label and not label.startswith("_"):
            seen.setdefault(label, a)
    return list(seen.values())


def _jitter(n: int, spread: float = 0.03) -> np.ndarray:
    """Multiplicative offsets that spread n points at one depth sideways."""
    return np.exp(spread * (np.arange(n) - (n - 1) / 2)) if n > 1 else np.ones(1)


def _interp_loglog(x: Sequence[float], y: Sequence[float], at: float) -> float | None:
    xs, ys = np.asarray(x, float), np.asarray(y, float)
    ok = np.isfinite(xs) & np.isfinite(ys) & (ys > 0)
    if ok.sum() < 2 or not xs[ok][0] <= at <= xs[ok][-1]:
        return None
    return float(np.exp(np.interp(math.log(at), np.log(xs[ok]), np.log(ys[ok]))))


def ci_words(ci: Sequence[float] | None, fmt: str) -> str:
    return "" if not ci or None in ci else f" [{ci[0]:{fmt}}, {ci[1]:{fmt}}]"


# ---------------------------------------------------------------- the depth law

def _draw_runs(ax: Axes, runs: Sequence[RunResult], colour: str, marker: str,
               with_labels: bool) -> list[Artist]:
    """Every run as a point: converged filled, censored as an open up-triangle at its budget,
    diverged as a cross along the top edge (it has no T)."""
    out: list[Artist] = []
    by_depth: dict[int, list[RunResult]] = {}
    for r in runs:
        by_depth.setdefault(r.depth, []).append(r)
    pts = {"converged": ([], []), "censored": ([], []), "diverged": ([], [])}
    for k, rs in by_depth.items():
        rs = sorted(rs, key=lambda r: r.seed)
        for r, f in zip(rs, _jitter(len(rs))):
            if r.status in pts:
                pts[r.status][0].append(k * f)
                pts[r.status][1].append(r.iterations)
    x, y = pts["converged"]
    if x:
        out.append(ax.scatter(x, y, s=14, marker=marker, facecolor=colour, edgecolor="none",
                              alpha=0.45, zorder=2, label="one run (seed)" if with_labels else None))
    x, y = pts["censored"]
    if x:
        out.append(ax.scatter(x, y, s=30, marker="^", facecolor="white", edgecolor=colour,
                              linewidth=1.1, zorder=3,
                              label="censored run: T ≥ budget" if with_labels else None))
    x, _ = pts["diverged"]
    if x:
        out.append(ax.scatter(x, [0.97] * len(x), s=26, marker="x", color=colour, zorder=3,
                              transform=ax.get_xaxis_transform(), clip_on=False,
                              label="diverged run (no T)" if with_labels else None))
    return out


def _draw_medians(ax: Axes, fit: FitGroup, colour: str, marker: str,
                  label: str | None) -> list[Artist]:
    rows = [r for r in fit.per_depth if r.median is not None]
    if not rows:
        return []
    k = np.array([r.depth for r in rows], float)
    med = np.array([r.median for r in rows], float)
    lo = np.array([r.q25 if r.q25 is not None else r.median for r in rows], float)
    hi = np.array([r.q75 if r.q75 is not None else r.median for r in rows], float)
    bars = ax.errorbar(k, med, yerr=[med - lo, hi - med], fmt=marker, ms=5.5, mfc=colour,
                       mec="black", mew=0.8, ecolor="black", elinewidth=1.0, capsize=2.5,
                       zorder=5, label=label)
    return [bars]


def _law_label(fit: FitGroup, prefix: str = "") -> str:
    pl, rev, model = fit.power_law, fit.reversal, fit.curve.model
    if prefix:       # one of several groups: short, the figure's caption says the rest
        alpha = f", α = {pl.alpha:.2f}" if given(pl.alpha) else ""
        return f"{prefix}s = {pl.slope:.2f}{ci_words(pl.slope_ci, '.2f')}{alpha}"
    text = f"fitted law T ∝ K^s, s = {pl.slope:.2f}{ci_words(pl.slope_ci, '.2f')}"
    if given(pl.alpha):
        text += f"\nα = 1/(1 − s) = {pl.alpha:.2f}{ci_words(pl.alpha_ci, '.2f')}"
    if model == "segmented" and given(rev.rising_slope):
        text += f"; slope past K*: {rev.rising_slope:.2f}"
    if model not in ("power_law", "segmented"):
        from ..fitting.summary import MODEL_LABELS
        text += f"\ncurve: {MODEL_LABELS.get(model, model)} (chosen by AICc)"
    return text


def _draw_law(ax: Axes, fit: FitGroup, colour: str, line: Any, prefix: str,
              band_label: str | None) -> list[Artist]:
    """The fitted law with its 95 % band, and its dotted extension to any extrapolated figure."""
    c = fit.curve
    out: list[Artist] = []
    k = np.asarray(c.depths, float)
    if None not in c.lo and None not in c.hi:
        out.append(ax.fill_between(k, c.lo, c.hi, color=colour, alpha=0.18, lw=0, zorder=1,
                                   label=band_label))
    out.extend(ax.plot(k, c.median, color=colour, ls=line, lw=1.8, zorder=4,
                       label=_law_label(fit, prefix)))
    far = extrapolated_depths(fit)
    if far and c.model == "power_law":
        top = max(far + [k[-1]])
        bottom = min(far + [k[0]])
        grid = np.geomspace(min(bottom, k[0]), max(top, k[-1]), 80)
        grid = grid[(grid < k[0]) | (grid > k[-1])]
        med, _, _ = _law_curve(fit, grid)
        for side in (grid < k[0], grid > k[-1]):
            if side.any():
                out.extend(ax.plot(grid[side], med[side], color=colour, ls=":", lw=1.6, zorder=4,
                                   label=f"{prefix}law extrapolated past the swept depths"))
    return out


def extrapolated_depths(fit: FitGroup) -> list[int]:
    """Planning depths of a fit that lie outside the swept depths."""
    plan = fit.planning
    out = [p.depth for p in (plan.last_depth_worth_adding, plan.compute_optimal_depth)
           if p.depth is not None and p.extrapolated]
    if plan.recommended_extrapolated and given(plan.recommended_depth):
        out.append(plan.recommended_depth)
    return sorted(set(out))


def _draw_reversal(ax: Axes, fit: FitGroup, colour: str, prefix: str = "") -> list[Artist]:
    rev = fit.reversal
    if rev.status != "observed" or rev.depth is None:
        return []
    out: list[Artist] = []
    if rev.depth_ci:
        out.append(ax.axvspan(*rev.depth_ci, color=GREY, alpha=0.15, lw=0, zorder=0))
    out.append(ax.axvline(rev.depth, color=colour, ls="--", lw=1.1, zorder=3,
                          label=f"{prefix or 'reversal depth '}K* = {rev.depth:.1f}"
                                f"{ci_words(rev.depth_ci, '.1f')}" + ("" if prefix else " (shaded)")))
    return out


def _curve_value(fit: FitGroup, k: float) -> float | None:
    c = fit.curve
    value = _interp_loglog(c.depths, c.median, k)
    if value is None and c.model == "power_law":
        value = float(_law_curve(fit, [k])[0][0])
    return value


_BEYOND = {"facecolor": "#f4f4f4", "edgecolor": "#c8c8c8", "hatch": "///", "linewidth": 0}


def _draw_beyond(ax: Axes, fit: FitGroup) -> list[Artist]:
    """Shade what lies beyond the swept depths and mark each planning figure found there."""
    far = extrapolated_depths(fit)
    if not far:
        return []
    swept = fit.depths_swept
    out: list[Artist] = []
    if max(far) > swept[-1]:
        out.append(ax.axvspan(swept[-1], max(far) * 1.12, zorder=0, **_BEYOND,
                              label="beyond the swept depths: not measured"))
    if min(far) < swept[0]:
        out.append(ax.axvspan(min(far) / 1.12, swept[0], zorder=0, **_BEYOND))
    plan = fit.planning
    for p, label, marker in ((plan.last_depth_worth_adding, "last depth worth adding", "D"),
                             (plan.compute_optimal_depth, "compute-optimal depth", "P")):
        k = p.depth
        y = None if k is None or not p.extrapolated else _curve_value(fit, k)
        if y is not None:
            out.append(ax.scatter([k], [y], s=55, marker=marker, facecolor="white", edgecolor="black",
                                  linewidth=1.1, zorder=6, label=f"{label}: K = {k} (extrapolated)"))
    return out


def _draw_plan(ax: Axes, fit: FitGroup, whose: str = "") -> list[Artist]:
    plan = fit.planning
    k = plan.recommended_depth
    y = None if not given(k) else _curve_value(fit, k)
    if y is None:
        return []
    tag = " (extrapolated)" if plan.recommended_extrapolated else ""
    return [ax.scatter([k], [y], s=150, marker="*", facecolor="white", edgecolor="black",
                       linewidth=1.2, zorder=6, label=f"depth to plan for{whose}: K = {k}{tag}")]


def _note_open_end(ax: Axes, fit: FitGroup) -> list[Artist]:
    rev, swept = fit.reversal, fit.depths_swept
    if rev.status != "beyond_range":
        return []
    text = (f"rise past K = {fit.power_law.depths_used[-1]} hinted, not established"
            if rev.rise_suspected else f"T still falls at K = {swept[-1]}:\nno reversal in range")
    return [ax.text(0.98, 0.97, text, transform=ax.transAxes, ha="right", va="top", fontsize=7.5,
                    bbox={"boxstyle": "round,pad=0.3", "fc": "white", "ec": "#999999", "lw": 0.6})]


def plot_scaling(fit: FitGroup, runs: Sequence[RunResult], ax: Axes, *,
                 groups: Sequence[FitGroup] | None = None,
                 numbers_in_legend: bool = True) -> list[Artist]:
    """Log-log updates against depth: every run, medians with quartiles, fitted law with band, K*.

    Args:
        fit: the fit (a `FitResult`, or one `by_learning_rate` `FitGroup`).
        runs: the run records; each group draws the runs it describes.
        ax: where to draw.
        groups: rate groups to overlay (default: every fitted group of `fit`,
            or `fit` alone); with several, each has its colour, marker and line.
        numbers_in_legend: put the slope, alpha and K* in the legend; without,
            the labels are the same for every panel (for a shared legend).

    Returns:
        The artists drawn.
    """
    groups = list(groups) if groups is not None else fitted_groups(fit)
    several = len(groups) > 1
    out: list[Artist] = []
    for i, g in enumerate(groups):
        colour, marker, line = GROUP_STYLES[i % len(GROUP_STYLES)] if several else \
            (BLUE, "o", "-")
        prefix = f"{group_label(g.group)}: " if several else ""
        out += _draw_runs(ax, group_runs(g, runs), colour, marker, with_labels=i == 0)
        first = i == 0
        out += _draw_medians(ax, g, colour if several else "white", marker if several else "s",
                             None if not first else "median per depth, bars: quartiles"
                             + (" (colour: rate group)" if several else ""))
        out += _draw_law(ax, g, "black" if not several else colour, line, prefix,
                         None if not first else ("95 % band of each fitted line" if several
                                                 else "95 % band of the fitted line"))
        out += _draw_reversal(ax, g, "black" if not several else colour, prefix)
    primary = groups[0] if not several else fit
    out += _draw_plan(ax, primary, f" ({group_label(fit.group)})" if several else "")
    out += _note_open_end(ax, primary)
    out += _draw_beyond(ax, primary)
    if not numbers_in_legend:
        generic = {"fitted law": "fitted law", "reversal depth": "reversal depth K* (shaded: interval)",
                   "depth to plan for": "depth to plan for"}
        for a in out:
            for start, label in generic.items():
                if a.get_label().startswith(start):
                    a.set_label(label)
    swept = sorted({k for g in groups for k in g.depths_swept} | set(extrapolated_depths(primary)))
    ax.legend(handles=labelled(out), loc="best")
    depth_panel(ax, swept, "SGD updates to convergence T")
    return out


def shared_legend(fig: Figure, axes: Sequence[Axes], ncol: int = 3) -> None:
    """Move the legends of `axes` into one under the figure (each label once), off the data."""
    seen: dict[str, Artist] = {}
    for ax in axes:
        pairs = list(zip(*ax.get_legend_handles_labels()))
        legend = ax.get_legend()
        if legend is not None:     # keep the order the plot function gave its legend
            order = [t.get_text() for t in legend.get_texts()]
            pairs.sort(key=lambda p: order.index(p[1]) if p[1] in order else len(order))
            legend.remove()
        for h, label in pairs:
            seen.setdefault(label, h)
    if seen:
        fig.legend(list(seen.values()), list(seen), loc="outside lower center",
                   ncol=min(ncol, len(seen)), frameon=False)
