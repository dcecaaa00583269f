"""The effective-rate effect of a fixed learning rate, in numbers and words (depthplan.fitting.rates).

The runs are invented (seeded synthetic draws from a known law, fitting_data.law_runs). Reference
values come from the identity log(T lr K) = log T + log lr + log K, so that at a fixed rate
T ~ K^s gives T lr K ~ K^(s + 1), and from worked examples computed by hand beside each check.
"""
from __future__ import annotations

from pathlib import Path

import pytest

from depthplan.fitting.assemble import fit_runs
from depthplan.fitting.rates import (
    FLAT_EXPONENT,
    MEANINGS,
    TUNE_KEY,
    rate_effect,
    rate_effect_of,
    rate_effect_words,
    single_rate_warning,
)
from depthplan.fitting.summary import format_summary
from depthplan.reporting.inputs import ReportInputs
from depthplan.reporting.markup import Words
from depthplan.reporting.tables import rate_blocks

from fitting_data import law_runs, run


def _report_words(fit: dict) -> str:
    """The text of the report's learning-rate section for `fit` (reporting.tables.rate_blocks)."""
    inp = ReportInputs(path=Path("t.csv"), kind="table", fit=fit, fit_note="", runs=[])
    return " ".join(b[1] for b in rate_blocks(inp, Words(fit)) if b[0] == "p")


# ---------------------------------------------------------------- through the fit

def test_a_single_fixed_rate_carries_the_rate_warning_with_its_remedy():
    fit = fit_runs(law_runs(-0.8), n_boot=40)
    text = " | ".join(fit["warnings"])
    assert "one fixed learning rate (0.1) served every depth" in text
    assert "train.learning_rate" in text and "low" in text and "trials" in text
    assert "Learning rate: one fixed rate served every depth" in format_summary(fit)
    tuned = fit_runs(law_runs(-0.8, lr_mode="tuned"), n_boot=40)
    assert tuned["rate_effect"] is None
    assert not any("fixed learning rate" in w for w in tuned["warnings"])
    assert "Learning rate:" not in format_summary(tuned)


@pytest.mark.parametrize("slope, direction, words, wrong", [
    (-1.5, "falling", "does more than multiply the rate", "acts like a learning-rate multiplier"),
    (-1.0, "flat", "acts like a learning-rate multiplier", "does more than multiply"),
    (-0.5, "rising", "less than multiplying the rate by K", "does more than multiply"),
])
def test_rate_interaction_direction_and_its_words(slope, direction, words, wrong):
    fit = fit_runs(law_runs(slope), n_boot=60)
    effect = fit["rate_effect"]
    assert effect["direction"] == direction
    assert effect["exponent"] == pytest.approx(slope + 1, abs=0.05)       # s + 1
    # fold of T lr K between K = 1 and 12 against the law: 12^(s + 1)
    assert effect["fold"] == pytest.approx(12 ** (slope + 1), rel=0.12)
    said = rate_effect_words(effect)
    assert words in said and wrong not in said
    assert {"falling": "falls", "flat": "stays about level", "rising": "rises"}[direction] in said
    assert words in _report_words(fit)                   # the report's sentence says the same
    # with a tuned group beside it, the interaction message says it too and the tuned rate heads
    both = law_runs(slope) + law_runs(-0.3, lr_mode="tuned", lr=0.2, seed=2)
    mixed = fit_runs(both, n_boot=60)
    assert mixed["group"]["lr_mode"] == "tuned"
    assert words in mixed["lr_interaction"]["message"]
    assert "headline figures are for the rate tuned per depth" in mixed["lr_interaction"]["message"]


# ---------------------------------------------------------------- the functions on their own

def _law(slope: float, ci: list[float], depths=(1, 2, 4, 8)) -> tuple[dict, list[dict]]:
    """A power law and per-depth medians exactly on T = 1000 K^slope."""
    return ({"slope": slope, "slope_ci": ci, "depths_used": list(depths)},
            [{"depth": k, "median": 1000 * k ** slope} for k in depths])


@pytest.mark.parametrize("slope, ci, direction", [
    (-1.5, [-1.7, -1.3], "falling"),     # exponent -0.5, its interval [-0.7, -0.3] excludes 0
    (-0.5, [-0.6, -0.4], "rising"),      # exponent +0.5, interval [0.4, 0.6]
    (-1.05, [-1.2, -0.9], "flat"),       # the interval [-0.2, 0.1] holds 0
    (-0.95, [-0.98, -0.92], "flat"),     # interval [0.02, 0.08] excludes 0, but 0.05 <= FLAT_EXPONENT
    (-0.85, [-0.88, -0.82], "rising"),   # 0.15 > FLAT_EXPONENT and the interval excludes 0
])
def test_the_direction_needs_an_interval_apart_from_zero_and_a_trend_past_the_flat_band(slope, ci, direction):
    assert FLAT_EXPONENT == 0.1
    law, rows = _law(slope, ci)
    effect = rate_effect([run(k, 10, lr=0.02) for k in (1, 2, 4, 8)], law, rows)
    assert effect["direction"] == direction and effect["meaning"] == MEANINGS[direction]
    assert effect["exponent"] == pytest.approx(slope + 1, abs=1e-12)
    assert effect["exponent_ci"] == pytest.approx([ci[0] + 1, ci[1] + 1], abs=1e-12)
    # worked by hand: on the law, the fold of T lr K from K = 1 to 8 is 8^(s + 1) (the rate cancels)
    assert effect["fold"] == pytest.approx(8 ** (slope + 1), rel=1e-12)
    assert (effect["learning_rate"], effect["from_depth"], effect["to_depth"]) == (0.02, 1, 8)


def test_no_effect_for_a_tuned_rate_several_rates_or_a_group_without_a_law():
    law, rows = _law(-0.5, [-0.6, -0.4])
    assert rate_effect([run(1, 10, lr_mode="tuned"), run(2, 10, lr_mode="tuned")], law, rows) is None
    assert rate_effect([run(1, 10, lr=0.02), run(2, 10, lr=0.04)], law, rows) is None
    # the search trials of a tuned sweep do not count as a second rate
    assert rate_effect([run(1, 10, lr=0.02), run(2, 10, lr=0.3, lr_mode="tuning")], law, rows) is not None
    group = {"group": {"lr_mode": "fixed", "learning_rate": 0.02}, "power_law": law, "per_depth": rows}
    assert rate_effect_of(group) == rate_effect([run(1, 10, lr=0.02)], law, rows)
    assert rate_effect_of({"group": {"lr_mode": "fixed", "learning_rate": 0.02}}) is None
    assert rate_effect_of({**group, "group": {"lr_mode": "tuned", "learning_rate": None}}) is None


def _effect(direction: str, fold: float | None, exponent: float) -> dict:
    return {"learning_rate": 0.02, "exponent": exponent, "direction": direction, "fold": fold,
            "from_depth": 1, "to_depth": 12, "meaning": MEANINGS[direction]}


@pytest.mark.parametrize("direction, fold, exponent, change", [
    ("rising", 12 ** 0.5, 0.5, "rises 3.5-fold"),                       # sqrt(12) = 3.464
    ("falling", 12 ** -0.5, -0.5, "falls 3.5-fold"),                    # 1 / 0.2887 = 3.464
    ("flat", 1.05, 0.02, "stays about level (1.05-fold from end to end)"),
    ("rising", 0.9, 0.12, "changes 0.90-fold between the ends although its fitted trend rises"),
    ("falling", 1.2, -0.2, "changes 1.20-fold between the ends although its fitted trend falls"),
    ("rising", None, 0.5, "rises"),
])
def test_rate_effect_words_worked_examples(direction, fold, exponent, change):
    text = rate_effect_words(_effect(direction, fold, exponent))
    assert text == (f"at the fixed rate 0.02, T·lr·K {change} over K = 1 to 12 "
                    f"(exponent {exponent:+.2f} in K): {MEANINGS[direction]}")


def test_single_rate_warning_names_the_rate_and_the_remedy():
    assert single_rate_warning(None) == ""
    effect = _effect("rising", 12 ** 0.5, 0.5)
    text = single_rate_warning(effect)
    assert text.startswith("one fixed learning rate (0.02) served every depth")
    assert rate_effect_words(effect) in text and text.endswith(f"{TUNE_KEY} in the sweep file")
