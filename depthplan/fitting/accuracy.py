"""Validation accuracy per depth, and the guard on the depth to plan for (no torch).

Fewer updates do not make a better network: a depth can converge fastest on the training loss
and still generalise worst. `accuracy_fields` gives a per-depth row its validation accuracy
(median and between-seed spread); `accuracy_check` compares the depth to plan for with the best
depth and says so when it is clearly worse, i.e. when the two spreads do not overlap.
"""
from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np


def accuracy_fields(runs: Sequence[Any]) -> dict[str, Any]:
    """Median validation accuracy of a depth's runs, with its spread over seeds.

    The spread is the lowest and highest seed (`validation_accuracy_spread` "min_max"): with the
    few seeds of a sweep, quartiles are too narrow to judge "clearly below" without flagging
    seed noise at whichever depth happens to rank first. Diverged runs count (a network that
    did not train is part of what the depth delivers). Null without measurements.
    """
    acc = np.array([r.validation_accuracy for r in runs
                    if isinstance(r.validation_accuracy, (int, float))
                    and math.isfinite(r.validation_accuracy)], float)
    if not len(acc):
        return {"validation_accuracy": None, "validation_accuracy_lo": None,
                "validation_accuracy_hi": None, "validation_accuracy_spread": None}
    return {"validation_accuracy": float(np.median(acc)), "validation_accuracy_lo": float(acc.min()),
            "validation_accuracy_hi": float(acc.max()), "validation_accuracy_spread": "min_max"}


def accuracy_check(per_depth: Sequence[dict[str, Any]], depth: int | None) -> dict[str, Any]:
    """How the validation accuracy at `depth` (the depth to plan for) compares with the best depth.

    Returns {depth, accuracy, best_depth, best_accuracy, clearly_below, note}. `clearly_below`
    is true when the best depth's median is higher and the spreads are apart (the planned
    depth's upper end below the best depth's lower end); `note` is then the warning sentence.
    A planned depth that was not swept is compared at the nearest swept depth on a log scale.
    """
    rows = [r for r in per_depth if r.get("validation_accuracy") is not None]
    out: dict[str, Any] = {"depth": None, "accuracy": None, "best_depth": None,
                           "best_accuracy": None, "clearly_below": False, "note": ""}
    if depth is None or len(rows) < 2:
        out["note"] = "" if rows else "validation accuracy was not measured"
        return out
    at = min(rows, key=lambda r: (abs(math.log(r["depth"] / depth)), r["depth"]))
    best = max(rows, key=lambda r: (r["validation_accuracy"], -r["depth"]))
    out.update(depth=at["depth"], accuracy=at["validation_accuracy"], best_depth=best["depth"],
               best_accuracy=best["validation_accuracy"])
    below = (best["validation_accuracy"] > at["validation_accuracy"]
             and at["validation_accuracy_hi"] < best["validation_accuracy_lo"])
    out["clearly_below"] = bool(below)
    if below:
        where = (f"K = {depth}" if at["depth"] == depth
                 else f"K = {depth} (nearest swept depth K = {at['depth']})")
        out["note"] = (f"the depth to plan for, {where}, has clearly lower validation accuracy "
                       f"({_pct(at)}) than K = {best['depth']} ({_pct(best)}): fewer updates to "
                       "converge do not make it the better network; weigh accuracy before "
                       "committing to it")
    return out


def _pct(row: dict[str, Any]) -> str:
    return (f"median {100 * row['validation_accuracy']:.1f} %, seeds "
            f"{100 * row['validation_accuracy_lo']:.1f}-{100 * row['validation_accuracy_hi']:.1f} %")
