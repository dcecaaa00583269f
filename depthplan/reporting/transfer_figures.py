"""The report's figure of the carry along proxy size: K* and s against size, the trend, the checks.

Drawn from fit.json's `transfer` block alone (per-size points with their intervals, the trend
curve with the band of its prediction, the held-out size predicted and measured, the target), onto
Axes it is given, in the style of `figures` (Okabe-Ito colours, markers that differ as well).
Everything right of the largest proxy used in the fit is extrapolation and lies on a hatched field.
"""
from __future__ import annotations

from typing import Any, Sequence

from matplotlib.artist import Artist
from matplotlib.axes import Axes

from ..fit_record import FitResult, Transfer, given
from . import figures as F

__all__ = ["has_transfer_figure", "plot_transfer_panel"]

_AXIS_WORDS = {"width": "proxy hidden width W", "train_rows": "proxy training rows n"}
_BEYOND = {"facecolor": "#f4f4f4", "edgecolor": "#c8c8c8", "hatch": "///", "linewidth": 0}


def has_transfer_figure(fit: FitResult) -> bool:
    t = fit.transfer
    return bool(t and t.curve and t.axes)


def _yerr(value: float, ci: Sequence[float] | None) -> list[list[float]]:
    if not ci or None in ci:
        return [[0.0], [0.0]]
    return [[max(0.0, value - ci[0])], [max(0.0, ci[1] - value)]]


def plot_transfer_panel(fit: FitResult, ax: Axes, quantity: str) -> list[Artist]:
    """One panel: `quantity` "reversal_depth" (K*, log axis) or "slope" (s) against proxy size."""
    t = fit.transfer
    curve = t.curve       # a plain block: x, the bands, largest_proxy, fixed
    axis = curve["axis"]
    log_y = quantity == "reversal_depth"
    name = "K*" if log_y else "s"
    out: list[Artist] = []
    x_all = list(curve["x"])
    ax.set_xscale("log")
    # the field beyond the largest proxy in the fit: extrapolation
    edge = curve["largest_proxy"]
    if x_all[-1] > edge * 1.001:
        out.append(ax.axvspan(edge, x_all[-1] * 1.15, zorder=0, label="beyond the largest proxy fitted "
                              "(extrapolated)", **_BEYOND))
    band = curve.get(quantity)
    if band:
        out.append(ax.fill_between(x_all, band["lo"], band["hi"], color=F.BLUE, alpha=0.16, lw=0, zorder=1,
                                   label="95 % prediction band of the trend"))
        out.extend(ax.plot(x_all, band["median"], color=F.BLUE, lw=1.6, zorder=3, label="fitted trend"))
    rows = [r for r in t.sizes if r.get(quantity) is not None and r.get(axis)]
    for i, r in enumerate(rows):
        out.append(ax.errorbar([r[axis]], [r[quantity]], yerr=_yerr(r[quantity], r.get(f"{quantity}_ci")),
                               fmt="o", ms=6, mfc=F.BLUE, mec="black", mew=0.8, ecolor="black", capsize=2.5,
                               zorder=5, label="one proxy size in the fit (95 % interval)" if i == 0 else None))
    out += _draw_check(ax, t, axis, quantity, name)
    out += _draw_target(ax, t, axis, quantity, name)
    ax.set_xlabel(_AXIS_WORDS.get(axis, axis))
    F.log_axis_numbers(ax.xaxis)
    if log_y:
        ax.set_yscale("log")
        F.log_axis_numbers(ax.yaxis)
        ax.set_ylabel("reversal depth K* (hidden layers)")
    else:
        ax.set_ylabel("slope s of T ∝ K^s")
    fixed = ", ".join(f"{a.replace('_', ' ')} {v:g}" for a, v in (curve.get("fixed") or {}).items())
    ax.set_title(f"{name} against proxy size" + (f" ({fixed})" if fixed else ""))
    return out


def _draw_check(ax: Axes, t: Transfer, axis: str, quantity: str, name: str) -> list[Artist]:
    v = t.verify
    x = getattr(v, axis) if v else None
    if not x:
        return []
    out: list[Artist] = []
    # predicted just left of the size, measured just right of it
    for block, shift, face, edge, mew, label in (
            (v.predicted, 1 / 1.04, "white", F.VERMILLION, 1.4, "held-out size: predicted before it trained"),
            (v.measured, 1.04, F.VERMILLION, "black", 0.8, "held-out size: measured")):
        value = (block or {}).get(quantity)
        if value is not None:
            out.append(_point(ax, x * shift, value, block.get(f"{quantity}_ci"), "D", 6, face, edge, mew, edge, 6, label))
    return out


def _point(ax: Axes, x: float, value: float, ci: Any, fmt: str, ms: float, face: str, edge: str, mew: float,
           bar: str, z: int, label: str) -> Artist:
    """One marked point with its interval as error bars."""
    return ax.errorbar([x], [value], yerr=_yerr(value, ci), fmt=fmt, ms=ms, mfc=face, mec=edge, mew=mew,
                       ecolor=bar, capsize=3, zorder=z, label=label)


def _draw_target(ax: Axes, t: Transfer, axis: str, quantity: str, name: str) -> list[Artist]:
    tg = t.target
    x = getattr(tg, axis) if tg else None
    if not x:
        return []
    out = [ax.axvline(x, color=F.GREY, ls="--", lw=1.0, zorder=2, label="target job")]
    value = getattr(tg, quantity)
    if given(value):
        ci = getattr(tg, f"{quantity}_ci")
        out.append(_point(ax, x, value, ci if given(ci) else None, "*", 11, F.ORANGE, "black", 0.8, F.ORANGE, 7,
                          "target: carried along size (95 % interval)"))
    return out
