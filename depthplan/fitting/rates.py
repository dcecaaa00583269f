"""The effective-rate effect of a fixed learning rate, in numbers and words (no torch).

At one fixed rate, a deeper stack moves its output further per update, so depth partly acts as
a learning-rate multiplier. If it acted as nothing else, T would fall as 1/(lr K) and T·lr·K
would stay constant. `rate_effect` measures how T·lr·K actually trends across the depths of a
fixed-rate group's law: its exponent is s + 1 (log T·lr·K = log T + log lr + log K, lr fixed),
with the interval of s shifted by 1, and its fold change from the medians. The direction and its
plain meaning:

    falling   s < -1: depth cuts updates faster than a rate multiplied by K would, so it does
              more than multiply the rate
    flat      s near -1 (its interval holds -1, or |s + 1| <= FLAT_EXPONENT): depth acts like
              a rate multiplier; a larger rate at fewer layers might buy the same gain
    rising    s > -1: depth cuts updates less than a rate multiplied by K would; the deeper nets
              do not turn their larger effective step into proportionally fewer updates
"""
from __future__ import annotations

from typing import Any, Sequence

from ..records import RateMode, rate_group

MEANINGS = {
    "falling": "depth cuts updates faster than multiplying the rate by K would, so it does more "
               "than multiply the rate",
    "flat": "depth acts like a learning-rate multiplier here: a larger rate at fewer layers might "
            "buy the same gain",
    "rising": "depth cuts updates less than multiplying the rate by K would: the deeper nets do "
              "not turn their larger effective step into proportionally fewer updates",
}

#: A trend of T·lr·K counts as falling or rising only when its exponent's interval excludes 0
#: and the exponent itself is beyond this size (0.1: over a tenfold depth range, a change of
#: more than about a quarter); smaller trends are called level.
FLAT_EXPONENT = 0.1

#: Where the remedy lives in the sweep file (README, "Tuned learning rates").
TUNE_KEY = "a `train.learning_rate` block with `low`, `high` and `trials`"


def rate_effect(runs: Sequence[Any], power_law: dict[str, Any],
                per_depth: Sequence[dict[str, Any]]) -> dict[str, Any] | None:
    """How T·lr·K trends over a fixed-rate group's law (None for a tuned or unrecorded rate).

    Returns {learning_rate, exponent, exponent_ci, direction, fold, from_depth, to_depth,
    meaning}; `fold` is the median T·lr·K at the deepest depth of the law over that at the
    shallowest (null when either median is unknown).
    """
    keys = {rate_group(r) for r in runs if r.lr_mode != RateMode.TUNING}
    if len(keys) != 1:
        return None
    return _effect(*next(iter(keys)), power_law, per_depth)


def rate_effect_of(group_fit: dict[str, Any]) -> dict[str, Any] | None:
    """`rate_effect` of a fitted group of fit.json (for files written before `rate_effect`)."""
    label = group_fit.get("group") or {}
    if "power_law" not in group_fit:
        return None
    return _effect(label.get("lr_mode"), label.get("learning_rate"), group_fit["power_law"],
                   group_fit.get("per_depth") or [])


def _effect(mode: str | None, lr: float | None, power_law: dict[str, Any],
            per_depth: Sequence[dict[str, Any]]) -> dict[str, Any] | None:
    if mode != RateMode.FIXED.value or lr is None or power_law.get("slope") is None:
        return None
    s, ci = power_law["slope"], power_law.get("slope_ci") or [None, None]
    exp_ci = [None if c is None else c + 1.0 for c in ci]
    if exp_ci[1] is not None and exp_ci[1] < 0 and s + 1.0 < -FLAT_EXPONENT:
        direction = "falling"
    elif exp_ci[0] is not None and exp_ci[0] > 0 and s + 1.0 > FLAT_EXPONENT:
        direction = "rising"
    else:
        direction = "flat"
    used = power_law.get("depths_used") or []
    rows = {r["depth"]: r["median"] for r in per_depth if r["depth"] in used}
    fold = None
    if used and rows.get(used[0]) and rows.get(used[-1]):
        fold = (rows[used[-1]] * used[-1]) / (rows[used[0]] * used[0])
    return {"learning_rate": lr, "exponent": s + 1.0, "exponent_ci": exp_ci,
            "direction": direction, "fold": fold,
            "from_depth": used[0] if used else None, "to_depth": used[-1] if used else None,
            "meaning": MEANINGS[direction]}


def rate_effect_words(effect: dict[str, Any]) -> str:
    """'at the fixed rate 0.02, T·lr·K rises 4.2-fold over K = 1 to 12: <meaning>'."""
    lr = f"at the fixed rate {effect['learning_rate']:g}"
    span = (f" over K = {effect['from_depth']} to {effect['to_depth']}"
            if effect.get("from_depth") is not None else "")
    fold = effect.get("fold")
    if fold is None:
        change = {"falling": "falls", "flat": "stays about level", "rising": "rises"}[effect["direction"]]
    elif effect["direction"] == "flat":
        change = f"stays about level ({fold:.2f}-fold from end to end)"
    elif fold >= 1:
        change = f"rises {fold:.1f}-fold" if effect["direction"] == "rising" else \
            f"changes {fold:.2f}-fold between the ends although its fitted trend falls"
    else:
        change = f"falls {1 / fold:.1f}-fold" if effect["direction"] == "falling" else \
            f"changes {fold:.2f}-fold between the ends although its fitted trend rises"
    return (f"{lr}, T·lr·K {change}{span} (exponent {effect['exponent']:+.2f} in K): "
            f"{effect['meaning']}")


def single_rate_warning(effect: dict[str, Any] | None) -> str:
    """The warning of a sweep with one fixed rate for every depth ('' when that is not the case)."""
    if not effect:
        return ""
    return (f"one fixed learning rate ({effect['learning_rate']:g}) served every depth, so the "
            "slope includes the rate effect: at the same rate a deeper net takes effectively "
            f"larger steps, and part of the gain credited to depth may be the rate's ("
            f"{rate_effect_words(effect)}); to separate the two, tune the rate per depth with "
            f"{TUNE_KEY} in the sweep file")
