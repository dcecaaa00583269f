"""Figures of what training cost and how it went: cost per depth, loss curves, probes, rates.

Like `depthplan.figures` (whose style and helpers these share), each `plot_*`
function draws onto the Axes it is given and returns the artists it added.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
from matplotlib.artist import Artist
from matplotlib.axes import Axes
from matplotlib.cm import ScalarMappable
from matplotlib.colors import ListedColormap, Normalize
from matplotlib.figure import Figure

from ..fitting.diffusion import NO_DROP_DB
from ..fitting.cost import cost_basis_of, cost_per_update
from ..fitting.planning import total_cost_curve
from ..fit_record import DiffusionDepth, FitGroup, FitResult, given
from ..records import RunResult
from .figures import (
    BLUE,
    GREY,
    GROUP_STYLES,
    LINE_STYLES,
    MARKERS,
    SKY_BLUE,
    VERMILLION,
    ci_words,
    depth_panel,
    fitted_groups,
    group_label,
    log_axis_numbers,
    ordered_colour,
)

# ---------------------------------------------------------------- cost per depth

def _timed(runs: Sequence[RunResult]) -> list[RunResult]:
    return [r for r in runs if isinstance(r.seconds_per_update, (int, float))
            and math.isfinite(r.seconds_per_update) and r.seconds_per_update > 0]


def has_timings(runs: Sequence[RunResult]) -> bool:
    return len({r.depth for r in _timed(runs)}) >= 2


def cost_words(seconds_intercept: float, seconds_per_layer: float) -> str:
    """'0.1 ms + 0.2 ms per layer' (or just the per-layer part when the intercept is 0)."""
    per_layer = f"{1e3 * seconds_per_layer:.3g} ms per layer"
    return f"{1e3 * seconds_intercept:.3g} ms + {per_layer}" if seconds_intercept > 0 else per_layer


def plot_seconds_per_update(fit: FitGroup, runs: Sequence[RunResult], ax: Axes) -> list[Artist]:
    """Measured milliseconds per update against depth, with the fitted straight cost line."""
    timed = _timed(runs)
    out = [ax.scatter([r.depth for r in timed], [1e3 * r.seconds_per_update for r in timed], s=12,
                      marker="o", facecolor=SKY_BLUE, edgecolor="none", alpha=0.6,
                      label="one run (seed)")]
    rows = [r for r in fit.per_depth if r.seconds_per_update is not None]
    out.append(ax.scatter([r.depth for r in rows], [1e3 * r.seconds_per_update for r in rows],
                          s=30, marker="s", facecolor="white", edgecolor="black", zorder=4,
                          label="median per depth"))
    cost = fit.planning.compute_optimal_depth.cost_model
    if cost and "seconds_intercept" in cost:          # the line of the seconds basis only
        k = np.linspace(min(fit.depths_swept), max(fit.depths_swept), 50)
        u, v = cost["seconds_intercept"], cost["seconds_per_layer"]
        out += ax.plot(k, 1e3 * (u + v * k), color="black", lw=1.4,
                       label=f"straight-line fit: {cost_words(u, v)}")
    depth_panel(ax, fit.depths_swept, "milliseconds per update", "cost of one update", log=False)
    ax.set_ylim(bottom=0)
    return out


def plot_total_cost(fit: FitGroup, runs: Sequence[RunResult], ax: Axes) -> list[Artist]:
    """Compute to convergence (updates x cost per update, on the fit's cost basis) against depth;
    compute-optimal depth marked."""
    cost = fit.planning.compute_optimal_depth.cost_model
    cost = cost if given(cost) else None
    flops = cost_basis_of(cost) == "flops"
    timed = [r for r in (runs if flops else _timed(runs)) if r.status in ("converged", "censored")]
    per_update = (lambda r: float(cost_per_update(cost, [r.depth])[0])) if flops else \
        (lambda r: r.seconds_per_update)
    out: list[Artist] = []
    for status, style in (("converged", {"marker": "o", "facecolor": SKY_BLUE, "edgecolor": "none",
                                         "alpha": 0.6, "label": "one run (seed)"}),
                          ("censored", {"marker": "^", "facecolor": "white", "edgecolor": VERMILLION,
                                        "label": "censored run: at least this"})):
        rs = [r for r in timed if r.status == status]
        if rs:
            out.append(ax.scatter([r.depth for r in rs], [r.iterations * per_update(r) for r in rs],
                                  s=14 if status == "converged" else 28, zorder=3, **style))
    curve = total_cost_curve(fit.to_dict())
    if curve is not None:
        out += ax.plot(curve[0], curve[1], color=BLUE, lw=1.8, zorder=4,
                       label="fitted T(K) × FLOPs per update" if flops else
                       "fitted T(K) × fitted seconds per update")
    opt = fit.planning.compute_optimal_depth
    if opt.depth is not None:
        if opt.ci:
            out.append(ax.axvspan(*opt.ci, color=GREY, alpha=0.13, lw=0, zorder=0))
        tag = " (extrapolated)" if opt.extrapolated else ""
        out.append(ax.axvline(opt.depth, color=VERMILLION, ls="--", lw=1.2,
                              label=f"compute-optimal K = {opt.depth}"
                                    f"{ci_words(opt.ci, 'd')}{tag}"))
    depth_panel(ax, fit.depths_swept, "FLOPs to converge (analytic count)" if flops else
                "seconds of compute to converge (this machine)", "cost of training to convergence")
    return out


# ---------------------------------------------------------------- training dynamics

def representative_runs(runs: Sequence[RunResult]) -> dict[int, RunResult]:
    """Per depth, the run with the median T among those with a loss curve."""
    by: dict[int, list[RunResult]] = {}
    for r in runs:
        if r.train_loss and r.eval_steps:
            by.setdefault(r.depth, []).append(r)
    return {k: sorted(rs, key=lambda r: (r.status != "converged", r.iterations))[(len(rs) - 1) // 2]
            for k, rs in sorted(by.items())}


def plot_loss_curves(runs: Sequence[RunResult], ax: Axes, *,
                     threshold: float | None = None) -> list[Artist]:
    """Training loss against updates, one representative run (median T) per depth."""
    reps = representative_runs(runs)
    out: list[Artist] = []
    for i, (k, r) in enumerate(reps.items()):
        steps = np.asarray(r.eval_steps, float)
        loss = np.asarray(r.train_loss, float)
        ok = np.isfinite(loss) & (loss > 0) & (steps > 0)
        out += ax.plot(steps[ok], loss[ok], color=ordered_colour(i, len(reps)),
                       ls=LINE_STYLES[i % len(LINE_STYLES)], lw=1.3, label=f"K = {k}")
    if threshold is not None:
        out.append(ax.axhline(threshold, color=VERMILLION, lw=1.0, ls=(0, (1, 1)),
                              label=f"converged below {threshold:g}"))
    ax.set_xscale("log")
    ax.set_yscale("log")
    log_axis_numbers(ax.xaxis)
    log_axis_numbers(ax.yaxis)
    ax.set_xlabel("SGD updates")
    ax.set_ylabel("training loss (cross-entropy, nats)")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    return out


def layer_medians(runs: Sequence[RunResult], key: str) -> tuple[np.ndarray, np.ndarray]:
    """(probe steps, values (layers, steps)): per layer, the median over seeds at each probe step.

    Runs share their grid steps and each adds its own last step T, so steps are matched by value;
    a step is kept while at least half the runs have it (runs stop at their T).
    """
    runs = [r for r in runs if getattr(r, key) and r.series_steps(key)]
    if not runs:
        return np.zeros(0), np.zeros((0, 0))
    n_layers = min(len(getattr(r, key)) for r in runs)
    steps = np.array(sorted({s for r in runs for s in r.series_steps(key)}), float)
    where = {s: i for i, s in enumerate(steps)}
    values = np.full((len(runs), n_layers, len(steps)), np.nan)     # NaN: the run has no probe there
    for i, r in enumerate(runs):
        cols = [where[float(s)] for s in r.series_steps(key)]
        for j in range(n_layers):
            row = np.asarray(getattr(r, key)[j], float)[:len(cols)]
            # a probe the run reached but could not measure (an SNR below the window's floor)
            # ranks below every measured value, so it pulls the median down instead of vanishing
            values[i, j, cols[:len(row)]] = np.where(np.isnan(row), -np.inf, row)
    reached = ~np.isnan(values[:, 0, :])
    keep = reached.sum(0) * 2 >= len(runs)
    with np.errstate(all="ignore"):
        med = np.nanmedian(values[:, :, keep], axis=0) if keep.any() else np.zeros((n_layers, 0))
    return steps[keep], np.where(np.isneginf(med), np.nan, med)     # a median below the floor: a gap


def _layer_lines(ax: Axes, steps: np.ndarray, values: np.ndarray) -> list[Artist]:
    n = len(values)
    return [line for j in range(n) for line in ax.plot(
        steps, values[j], color=ordered_colour(j, n), lw=1.1,
        ls=LINE_STYLES[j % len(LINE_STYLES)] if n <= len(LINE_STYLES) else "-")]


def layer_colourbar(fig: Figure, axes: Sequence[Axes], n_layers: int) -> None:
    """A colour bar that names the layer colours (1 = input side, last = output layer)."""
    cmap = ListedColormap([ordered_colour(j, n_layers) for j in range(n_layers)])
    sm = ScalarMappable(norm=Normalize(0.5, n_layers + 0.5), cmap=cmap)
    bar = fig.colorbar(sm, ax=list(axes), shrink=0.9, pad=0.01, aspect=30)
    bar.set_label(f"layer (1 = input side, {n_layers} = output)")
    bar.set_ticks(sorted({1, n_layers, *range(1, n_layers + 1, max(1, n_layers // 6))}))


def _by_depth(fit: FitGroup) -> list[DiffusionDepth]:
    """`diffusion.by_depth`, [] when the fit has none."""
    return (fit.diffusion.by_depth or []) if fit.diffusion else []


def _transition(fit: FitGroup, depth: int) -> float | None:
    layers = (fit.diffusion.layers or []) if fit.diffusion else []
    rows = [r.transition_step for r in layers if r.depth == depth and r.transition_step is not None]
    return float(np.median(rows)) if rows else None


def _draw_transition(ax: Axes, step: float | None) -> list[Artist]:
    if step is None:
        return []
    return [ax.axvline(step, color=VERMILLION, ls="-.", lw=1.2,
                       label=f"transition (median over layers): step {step:.0f}")]


def plot_displacement(fit: FitGroup, runs: Sequence[RunResult], ax: Axes, *,
                      depth: int) -> list[Artist]:
    """Weight displacement ||W_t - W_0|| per layer at one depth, with slope-1 and slope-1/2 guides."""
    steps, med = layer_medians([r for r in runs if r.depth == depth], "displacement")
    out = _layer_lines(ax, steps, med)
    if len(steps) >= 2:
        centre = np.exp(np.nanmean(np.log(np.where(med > 0, med, np.nan)), axis=0))
        t0, t1 = steps[0], steps[-1]
        span = math.log(t1 / t0)
        a = np.geomspace(t0, t0 * math.exp(0.45 * span), 20)
        out += ax.plot(a, centre[0] * 0.6 * a / t0, color="black", ls="--", lw=1.5, zorder=5,
                       label="slope 1: drift (D ∝ t)")
        b = np.geomspace(t1 * math.exp(-0.45 * span), t1, 20)
        out += ax.plot(b, centre[-1] * 1.6 * np.sqrt(b / t1), color="black", ls=":", lw=1.8,
                       zorder=5, label="slope 1/2: diffusion (D ∝ √t)")
    out += _draw_transition(ax, _transition(fit, depth))
    ax.set_xscale("log")
    ax.set_yscale("log")
    log_axis_numbers(ax.xaxis)
    ax.set_xlabel("SGD updates t")
    ax.set_ylabel("weight displacement ‖W_t − W_0‖ (Frobenius)")
    log_axis_numbers(ax.yaxis)
    ax.set_title(f"weight displacement per layer, K = {depth}")
    ax.legend(loc="best")
    return out


def plot_snr(fit: FitGroup, runs: Sequence[RunResult], ax: Axes, *, depth: int) -> list[Artist]:
    """Gradient signal-to-noise ratio per layer in dB at one depth, transition step marked."""
    steps, med = layer_medians([r for r in runs if r.depth == depth], "snr_db")
    out = _layer_lines(ax, steps, med)
    out.append(ax.axhline(0.0, color=GREY, lw=0.8, label="0 dB: signal = noise"))
    out += _draw_transition(ax, _transition(fit, depth))
    ax.set_xscale("log")
    log_axis_numbers(ax.xaxis)
    ax.set_xlabel("SGD updates t")
    ax.set_ylabel("gradient SNR (dB)")
    ax.set_title(f"gradient signal-to-noise per layer, K = {depth}")
    ax.legend(loc="best")
    return out


def has_depth_dynamics(fit: FitGroup) -> bool:
    """Whether fit.json carries per-depth probe measures (`diffusion.by_depth`) at two depths or more."""
    return len(_by_depth(fit)) >= 2


def _depth_errorbars(fit: FitGroup, ax: Axes, key: str) -> list[Artist]:
    """Median of `diffusion.by_depth[*].<key>` against K, bars over its between-seed spread."""
    rows = [r for r in _by_depth(fit) if given(getattr(r, key))]
    if not rows:
        return []

    def bound(r: DiffusionDepth, end: str) -> float:
        v = getattr(r, f"{key}_{end}")
        return v if given(v) else getattr(r, key)

    k = np.array([r.depth for r in rows], float)
    y = np.array([getattr(r, key) for r in rows], float)
    lo = np.array([bound(r, "lo") for r in rows], float)
    hi = np.array([bound(r, "hi") for r in rows], float)
    kinds = {r.spread if given(r.spread) else None for r in rows}
    spread = {frozenset({"iqr"}): "quartiles", frozenset({"min_max"}): "min to max"}.get(
        frozenset(kinds), "quartiles (min to max under 4 runs)")
    bars = ax.errorbar(k, y, yerr=[np.maximum(y - lo, 0), np.maximum(hi - y, 0)], color=BLUE,
                       marker="s", ms=5, lw=1.2, capsize=3,
                       label=f"median per depth; bars: {spread} of the seed runs")
    return [bars]


def plot_snr_drop_by_depth(fit: FitGroup, ax: Axes) -> list[Artist]:
    """Median fall of the gradient SNR (dB) per depth with its between-seed spread."""
    out = _depth_errorbars(fit, ax, "snr_drop_db")
    out.append(ax.axhline(NO_DROP_DB, color=VERMILLION, ls="--", lw=1.0,
                          label=f"{NO_DROP_DB:g} dB: under it, no drop"))
    out.append(ax.axhline(0.0, color=GREY, lw=0.8))
    depth_panel(ax, fit.depths_swept, "gradient SNR drop, early to late (dB)",
                "SNR drop per depth", log=False)
    return out


def plot_late_exponent_by_depth(fit: FitGroup, ax: Axes) -> list[Artist]:
    """Median late-phase growth exponent of the displacement per depth, guides at 1 and 1/2, and
    alpha from the depth law with its interval.

    The exponent over the last half of each run (`late_window_exponent`) where fit.json has it,
    else (older files) the one after the transition.
    """
    window = any(given(r.late_window_exponent) for r in _by_depth(fit))
    out = _depth_errorbars(fit, ax, "late_window_exponent" if window else "late_exponent")
    out.append(ax.axhline(1.0, color="black", ls="--", lw=1.0, label="1: drift (D ∝ t)"))
    out.append(ax.axhline(0.5, color="black", ls=":", lw=1.4, label="1/2: diffusion (D ∝ √t)"))
    late = fit.diffusion.late_window if fit.diffusion else None
    if late and given(late.alpha):
        ci = late.alpha_ci or None
        if ci and None not in ci:
            out.append(ax.axhspan(ci[0], ci[1], color=VERMILLION, alpha=0.15, lw=0, zorder=0))
        out.append(ax.axhline(late.alpha, color=VERMILLION, lw=1.2,
                              label=f"α from the depth law: {late.alpha:.2f}{ci_words(ci, '.2f')}"))
    what = "steps T/2 to T" if window else "after the transition"
    depth_panel(ax, fit.depths_swept, f"exponent of ‖W_t − W_0‖ ({what})",
                "displacement exponent per depth", log=False)
    return out


def has_information(runs: Sequence[RunResult]) -> bool:
    """Whether any run carries the information probe's series."""
    return any(r.information_xt and r.information_ty for r in runs)


def plot_information_plane(runs: Sequence[RunResult], ax: Axes, *, depth: int) -> list[Artist]:
    """Each layer's path in the (I(X;T), I(T;Y)) plane at one depth, medians over seeds per probe step.

    Circles mark the first probe, squares the last; the path runs through the probe steps in order.
    """
    at = [r for r in runs if r.depth == depth]
    _, xt = layer_medians(at, "information_xt")
    _, ty = layer_medians(at, "information_ty")
    n = min(len(xt), len(ty))
    out: list[Artist] = []
    for j in range(n):
        colour = ordered_colour(j, n)
        ok = np.isfinite(xt[j]) & np.isfinite(ty[j])
        x, y = xt[j][ok], ty[j][ok]
        if not len(x):
            continue
        out += ax.plot(x, y, color=colour, lw=1.1, marker=".", ms=3)
        out.append(ax.scatter(x[:1], y[:1], s=28, marker="o", facecolor="white", edgecolor=colour, zorder=4))
        out.append(ax.scatter(x[-1:], y[-1:], s=28, marker="s", facecolor=colour, edgecolor="black",
                              linewidth=0.6, zorder=4))
    out.append(ax.scatter([], [], s=28, marker="o", facecolor="white", edgecolor=GREY, label="first probe"))
    out.append(ax.scatter([], [], s=28, marker="s", facecolor=GREY, edgecolor="black", label="last probe"))
    ax.set_xlabel("I(X;T), bits (binned)")
    ax.set_ylabel("I(T;Y), bits (binned)")
    ax.set_title(f"information plane per layer, K = {depth}")
    ax.legend(loc="lower right")
    return out


# ---------------------------------------------------------------- learning rates

def plot_rate_product(fit: FitResult, runs: Sequence[RunResult], ax: Axes) -> list[Artist]:
    """Median T·lr·K per depth for each fixed-rate group: flat where depth acts as a rate multiplier."""
    out: list[Artist] = []
    groups = [g for g in fitted_groups(fit) if g.group.lr_mode == "fixed" and g.group.learning_rate]
    for i, g in enumerate(groups):
        colour, marker, line = GROUP_STYLES[i % len(GROUP_STYLES)]
        lr = g.group.learning_rate
        rows = [r for r in g.per_depth if r.median is not None]
        out += ax.plot([r.depth for r in rows], [r.median * lr * r.depth for r in rows],
                       color=colour, marker=marker, ls=line, lw=1.3, ms=5,
                       label=group_label(g.group))
    depth_panel(ax, sorted({k for g in groups for k in g.depths_swept}), "median T × lr × K",
                "flat where depth multiplies the rate")
    return out


def plot_tuning(rows: Sequence[dict[str, Any]], ax: Axes) -> list[Artist]:
    """Tuning trials: objective (median T of a trial's seeds) against the learning rate, per depth."""
    depths = sorted({int(r["depth"]) for r in rows})
    out: list[Artist] = []
    for i, k in enumerate(depths):
        at = [r for r in rows if int(r["depth"]) == k]
        colour = ordered_colour(i, len(depths))
        marker = MARKERS[i % len(MARKERS)]
        line = sorted(at, key=lambda r: r["learning_rate"])
        out += ax.plot([r["learning_rate"] for r in line], [r["objective"] for r in line],
                       color=colour, lw=0.7, alpha=0.6)
        out.append(ax.scatter([r["learning_rate"] for r in at], [r["objective"] for r in at], s=18,
                              marker=marker, facecolor="none", edgecolor=colour, linewidth=1.0,
                              label=f"K = {k}"))
        best = min(at, key=lambda r: r["objective"])
        out.append(ax.scatter([best["learning_rate"]], [best["objective"]], s=48, marker=marker,
                              facecolor=colour, edgecolor="black", linewidth=0.8, zorder=4))
    ax.set_xscale("log")
    ax.set_yscale("log")
    log_axis_numbers(ax.xaxis)
    log_axis_numbers(ax.yaxis)
    ax.set_xlabel("learning rate (per update)")
    ax.set_ylabel("trial objective: median T (updates)")
    ax.set_title("tuning trials (filled: the rate chosen)")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False,
              ncol=2 if len(depths) > 10 else 1)
    return out
