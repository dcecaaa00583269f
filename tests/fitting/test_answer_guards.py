"""The accuracy guard and the learning-rate cautions of a fit.

Every data set here is invented (seeded synthetic runs from a known law); reference values come
from numpy's median and quantiles, and from the identity log(T lr K) = log T + log lr + log K,
so that at a fixed rate T ~ K^s gives T lr K ~ K^(s + 1).
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from depthplan import fitting as F
from depthplan.fitting.accuracy import accuracy_fields
from depthplan.fit_record import FitGroup
from depthplan.fitting.rates import rate_effect_words
from depthplan.records import RunResult
from depthplan.reporting.tables import _rate_product_words

DEPTHS = (1, 2, 3, 4, 6, 8, 12)


def _runs(slope: float, *, accuracy=lambda k, rng: 0.9, lr: float = 0.1, lr_mode: str = "fixed",
          seed: int = 1, n_seeds: int = 4) -> list[RunResult]:
    rng = np.random.default_rng(seed)
    out = []
    for k in DEPTHS:
        for s in range(n_seeds):
            t = 20000 * k ** slope * math.exp(rng.normal(0, 0.03))
            out.append(RunResult(depth=k, width=16, seed=s, learning_rate=lr, status="converged",
                                 iterations=int(t), wall_seconds=math.nan, seconds_per_update=math.nan,
                                 final_train_loss=0.1, final_train_accuracy=1.0,
                                 validation_accuracy=accuracy(k, rng), n_params=0, lr_mode=lr_mode,
                                 extra={"network": {"n_inputs": 400, "n_classes": 3, "batch_size": 16,
                                                    "widths": [16] * k}}))
    return out


# ---------------------------------------------------------------- accuracy

def test_per_depth_accuracy_is_the_median_and_spread_over_seeds():
    rng = np.random.default_rng(3)
    runs = _runs(-0.8, accuracy=lambda k, r: float(rng.uniform(0.6, 0.9)))
    fit = F.fit_runs(runs, n_boot=40)
    for row in fit["per_depth"]:
        acc = [r.validation_accuracy for r in runs if r.depth == row["depth"]]
        assert row["validation_accuracy"] == pytest.approx(np.median(acc))          # numpy
        assert [row["validation_accuracy_lo"], row["validation_accuracy_hi"]] == [min(acc), max(acc)]
        assert row["validation_accuracy_spread"] == "min_max"
    assert accuracy_fields([])["validation_accuracy"] is None


def test_a_planned_depth_with_clearly_worse_accuracy_is_flagged_first():
    # accuracy falls 1.5 points per layer, seed noise 0.3 points: deep is clearly worse than K = 1
    worse = _runs(-0.8, accuracy=lambda k, rng: 0.80 - 0.015 * k + rng.normal(0, 0.003))
    fit = F.fit_runs(worse, n_boot=40)
    check = fit["planning"]["accuracy_check"]
    rec = fit["planning"]["recommended_depth"]
    assert rec > 1 and check["clearly_below"] and check["best_depth"] == 1
    assert "clearly lower validation accuracy" in fit["warnings"][0]
    lines = F.format_summary(fit).splitlines()
    assert lines[1].startswith("Recommended depth")
    assert lines[2].startswith("Accuracy warning:") and "K = 1" in lines[2]
    # the same law with accuracy level across depths (spreads overlap): no warning
    level = _runs(-0.8, accuracy=lambda k, rng: 0.80 + rng.normal(0, 0.01))
    fit = F.fit_runs(level, n_boot=40)
    assert not fit["planning"]["accuracy_check"]["clearly_below"]
    assert not any("validation accuracy" in w for w in fit["warnings"])
    assert "Accuracy warning" not in F.format_summary(fit)


# ---------------------------------------------------------------- learning rate

def test_a_single_fixed_rate_carries_the_rate_warning_with_its_remedy():
    fit = F.fit_runs(_runs(-0.8), n_boot=40)
    text = " | ".join(fit["warnings"])
    assert "one fixed learning rate (0.1) served every depth" in text
    assert "train.learning_rate" in text and "low" in text and "trials" in text
    assert "Learning rate: one fixed rate served every depth" in F.format_summary(fit)
    tuned = F.fit_runs(_runs(-0.8, lr_mode="tuned"), n_boot=40)
    assert tuned["rate_effect"] is None
    assert not any("fixed learning rate" in w for w in tuned["warnings"])
    assert "Learning rate:" not in F.format_summary(tuned)


@pytest.mark.parametrize("slope, direction, words, wrong", [
    (-1.5, "falling", "does more than multiply the rate", "acts like a learning-rate multiplier"),
    (-1.0, "flat", "acts like a learning-rate multiplier", "does more than multiply"),
    (-0.5, "rising", "less than multiplying the rate by K", "does more than multiply"),
])
def test_rate_interaction_direction_and_its_words(slope, direction, words, wrong):
    fit = F.fit_runs(_runs(slope), n_boot=60)
    effect = fit["rate_effect"]
    assert effect["direction"] == direction
    assert effect["exponent"] == pytest.approx(slope + 1, abs=0.05)       # s + 1
    # fold of T lr K between K = 1 and 12 against the law: 12^(s + 1)
    assert effect["fold"] == pytest.approx(12 ** (slope + 1), rel=0.12)
    said = rate_effect_words(effect)
    assert words in said and wrong not in said
    assert {"falling": "falls", "flat": "stays about level", "rising": "rises"}[direction] in said
    assert words in _rate_product_words(FitGroup.from_dict(fit))   # the report's sentence says the same
    # with a tuned group beside it, the interaction message says it too and the tuned rate heads
    both = _runs(slope) + _runs(-0.3, lr_mode="tuned", lr=0.2, seed=2)
    mixed = F.fit_runs(both, n_boot=60)
    assert mixed["group"]["lr_mode"] == "tuned"
    assert words in mixed["lr_interaction"]["message"]
    assert "headline figures are for the rate tuned per depth" in mixed["lr_interaction"]["message"]
