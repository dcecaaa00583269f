"""The report's opening words (depthplan.reporting.answer): the depth to plan for, the accuracy
warning, the flat stretch of total compute, the probes' cross-check, the swept network in words.

Inputs are invented (seeded synthetic tables drawn from a known law) or the stored demo folder of
conftest.py; outside references (closed forms, brute force over fit.json's rows) are named
beside each check.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from depthplan.config import ModelConfig
from depthplan.fit_record import FitResult
from depthplan.fitting.assemble import fit_path, fit_runs
from depthplan.fitting.inputs import load_runs
from depthplan.records import RunResult
from depthplan.reporting.answer import answer_blocks, dynamics_words, flat_cost_range, model_words
from depthplan.reporting.inputs import ReportInputs
from depthplan.reporting.markup import Words, to_markdown

from report_data import PNG_SIGNATURE


def _answer_markdown(path: Path, fit: dict, runs) -> str:
    inp = ReportInputs(path=path, kind="table", fit=fit, fit_note="", runs=list(runs))
    return to_markdown(answer_blocks(inp, Words(fit)), fit, "Depth plan", "figures")


# ------------------------------------------------------------------ in a written report

def test_report_leads_with_the_accuracy_warning(tmp_path):
    # Invented table: a clean law T = 8000 K^-0.7 plans deep, where validation accuracy is clearly
    # worse (every seed at K >= 8 below every seed at K <= 4).
    rng = np.random.default_rng(3)
    rows = ["depth,seed,iterations,validation_accuracy"]
    for k in (1, 2, 4, 8, 16):
        for s in range(3):
            acc = (0.90 if k <= 4 else 0.70) + 0.005 * s
            rows.append(f"{k},{s},{int(8000 * k ** -0.7 * math.exp(rng.normal(0, 0.03)))},{acc}")
    table = tmp_path / "acc.csv"
    table.write_text("\n".join(rows) + "\n")
    fit, _ = fit_path(table, n_boot=100)
    check = fit["planning"]["accuracy_check"]
    assert check["clearly_below"] and "clearly lower validation accuracy" in fit["warnings"][0]
    md = _answer_markdown(table, fit, load_runs(table))
    answer = md.split("## The answer", 1)[1].split("\n\n")
    lead = [b.strip().lstrip("> ") for b in answer if b.strip()][:3]
    assert lead[0].startswith("**Plan for") and lead[1].startswith("**Accuracy warning.**")
    assert f"K = {check['best_depth']}" in lead[1]


def test_stored_folder_report_shows_the_snr_drop_per_depth(folder_report):
    _, paths = folder_report
    by_depth = json.loads(paths["fit"].read_text())["diffusion"]["by_depth"]
    figure = next(p for p in paths["figures"] if p.name == "dynamics-by-depth.png")
    assert figure.read_bytes()[:8] == PNG_SIGNATURE
    md = paths["md"].read_text(encoding="utf-8")
    drops = [r for r in by_depth if r["snr_drop_db"] is not None]
    # the sentence quotes fit.json's drops at the shallowest and deepest depths
    assert (f"the median SNR drop is {drops[0]['snr_drop_db']:.1f} dB at K = {drops[0]['depth']} "
            f"and {drops[-1]['snr_drop_db']:.1f} dB at K = {drops[-1]['depth']}") in md
    # brute force over fit.json's rows: the first depth from which every drop is under 2 dB
    flat = next(r["depth"] for i, r in enumerate(drops)
                if all(q["snr_drop_db"] < 2.0 for q in drops[i:]))
    assert f"From K = {flat} on, the gradient SNR does not drop (median drop under 2 dB)." in md


# ------------------------------------------------------------------ the functions on their own

def test_flat_cost_range_matches_the_closed_form_of_the_total_compute():
    # Invented law T = 1000 K^-0.5 and a cost of 8 + K seconds per update: the total
    # 1000 (8 K^-0.5 + K^0.5) has its minimum where d/dK = 0, at K = 8, and in x = sqrt(K / 8) it
    # is proportional to (x + 1/x) / 2, which stays within 10 % of the minimum for
    # 0.642 <= x <= 1.558, i.e. 3.30 <= K <= 19.4: whole depths 4 to 19 (worked by hand).
    k = np.geomspace(1, 32, 200)
    fit = FitResult.from_dict({
        "planning": {"compute_optimal_depth": {"cost_model": {
            "basis": "seconds", "seconds_intercept": 8.0, "seconds_per_layer": 1.0}}},
        "curve": {"depths": k.tolist(), "median": (1000 * k ** -0.5).tolist()}})
    assert flat_cost_range(fit) == (4, 19)
    # brute force over whole depths on the closed form gives the same stretch
    ks = np.arange(1, 33)
    total = 1000 * (8 * ks ** -0.5 + ks ** 0.5)
    near = ks[total <= 1.10 * total.min()]
    assert (int(near[0]), int(near[-1])) == (4, 19)
    without_cost = FitResult.from_dict({"planning": {"compute_optimal_depth": {"cost_model": None}},
                                        "curve": {"depths": k.tolist(), "median": k.tolist()}})
    assert flat_cost_range(without_cost) is None


def test_a_law_without_depth_gain_plans_the_shallowest_depth_and_says_why():
    # Invented runs: T = 2000 K^+0.2 (slope above zero: added layers cost updates), 3 seeds, 5 % noise
    rng = np.random.default_rng(11)
    runs = [RunResult(depth=k, width=8, seed=s, learning_rate=0.1, status="converged",
                      iterations=int(2000 * k ** 0.2 * math.exp(rng.normal(0, 0.05))),
                      wall_seconds=math.nan, seconds_per_update=math.nan, final_train_loss=0.1,
                      final_train_accuracy=1.0, validation_accuracy=math.nan, n_params=0)
            for k in (1, 2, 3, 4, 6) for s in range(3)]
    fit = fit_runs(runs, n_boot=40)
    assert fit["depth_gain"] is False and fit["planning"]["recommended_depth"] == 1
    md = _answer_markdown(Path("t.csv"), fit, runs)
    assert "> **Plan for 1 hidden layers**. Depth gives no gain over the swept depths" in md
    assert f"the fitted slope s = {fit['power_law']['slope']:.2f} is not clearly below zero" in md
    assert "advice from small proxies can mislead a costly decision" in md
    assert dynamics_words(FitResult.from_dict(fit), Words(fit)) == ""       # no probes recorded


@pytest.mark.parametrize("model, words", [
    (ModelConfig(width=16), "an MLP of width 16 (tanh, He initialisation)"),
    (ModelConfig(width=(32, 16), activation="relu", init="xavier"),
     "an MLP of width 32/16 (relu, Xavier initialisation)"),
    (ModelConfig(width=8, family="residual", branch_scale="depth", norm="layer"),
     "a residual network of width 8: an input projection, K one-layer pre-activation blocks (each "
     "branch scaled by 1/sqrt(K), LayerNorm before the activation) and a linear readout (tanh, He "
     "initialisation)"),
    (ModelConfig(width=8, family="conv", channels=12),
     "a convolutional network of K 3x3 blocks with 12 channels, global average pooling and a linear "
     "readout (tanh, He initialisation)"),
    (ModelConfig(factory="nets:build", options={"p": 1}),
     "the user's own module from `nets:build` (options {'p': 1})"),
])
def test_model_words_name_each_family(model, words):
    assert model_words(model) == words
