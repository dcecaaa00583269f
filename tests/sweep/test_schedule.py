"""The scheduler: adaptive depths on a simulated objective, early censoring, learning-rate tuning."""
from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import optuna
import pytest

from depthplan.config import AdaptiveConfig, TuneConfig, geometric_depths, load_config
from depthplan.records import CellSpec, RunResult
from depthplan.sweep.schedule import decide, early_budget, median_t, rate_at_edge, tuning_objective
from depthplan.sweep.run import run_sweep


def _run(depth: int, seed: int, t: int, status: str = "converged", lr: float = 0.1, mode: str = "fixed") -> RunResult:
    return RunResult(depth=depth, width=8, seed=seed, learning_rate=lr, status=status, iterations=t,
                     wall_seconds=0.01 * t, seconds_per_update=0.01, final_train_loss=0.1,
                     final_train_accuracy=1.0, validation_accuracy=math.nan, n_params=1, lr_mode=mode)


def _simulate(depth: int, seeds: list[int], rng: np.random.Generator) -> list[RunResult]:
    # invented objective: T(K) = 4000/K + 40 K, log-normal seed noise; minimum at K = 10
    mean = 4000.0 / depth + 40.0 * depth
    return [_run(depth, s, int(round(mean * math.exp(0.08 * rng.standard_normal())))) for s in seeds]


def test_adaptive_policy_reaches_the_target_with_fewer_runs_than_the_full_grid() -> None:
    rng = np.random.default_rng(7)
    policy = AdaptiveConfig(low=1, high=40, target_width=3.0, max_rounds=8, extra_seeds=2)
    seeds = {k: list(range(5)) for k in geometric_depths(policy.low, policy.high // 2)}
    runs = [r for k, s in seeds.items() for r in _simulate(k, s, rng)]
    rounds = []
    while True:
        d = decide(runs, policy, round_no=len(rounds) + 1, cpu_seconds=0.0, n_boot=100, seed=1)
        rounds.append(d)
        if d.stop:
            break
        for k in d.add_depths:
            seeds[k] = list(range(5))
            runs += _simulate(k, seeds[k], rng)
        for k, n in d.add_seeds.items():
            new = list(range(max(seeds[k]) + 1, max(seeds[k]) + 1 + n))
            seeds[k] += new
            runs += _simulate(k, new, rng)
    full_grid = (policy.high - policy.low + 1) * 5
    print(f"adaptive: {len(runs)} runs over {len(seeds)} depths in {len(rounds)} rounds; full grid: {full_grid} runs")
    final = rounds[-1]
    assert "within the target" in final.reason, [r.reason for r in rounds]
    lo, hi = final.reversal["depth_ci"]
    assert hi - lo <= policy.target_width
    assert lo - 1 <= 10 <= hi + 1          # the known minimum of the invented objective
    assert len(runs) < full_grid


def test_adaptive_policy_stops_when_t_still_falls_at_the_deepest_depth() -> None:
    rng = np.random.default_rng(3)
    policy = AdaptiveConfig(low=1, high=16, target_width=2.0, max_rounds=5, extra_seeds=0)
    runs = [_run(k, s, int(5000 / k * math.exp(0.05 * rng.standard_normal()))) for k in (1, 2, 4, 8, 16) for s in range(4)]
    d = decide(runs, policy, round_no=1, cpu_seconds=0.0, n_boot=50)
    assert d.stop and "still falls at the deepest allowed depth (16)" in d.reason
    budget = AdaptiveConfig(low=1, high=64, cpu_budget_s=10.0)
    assert "compute budget spent" in decide(runs, budget, round_no=1, cpu_seconds=11.0, n_boot=20).reason
    going = decide(runs, AdaptiveConfig(low=1, high=64, extra_seeds=0), round_no=1, cpu_seconds=0.0, n_boot=50)
    assert not going.stop and min(going.add_depths) > 16


def test_early_budget_is_a_multiple_of_the_best_median_so_far() -> None:
    stored = [_run(1, s, t) for s, t in enumerate((900, 1000, 1100))] + \
             [_run(2, s, t) for s, t in enumerate((400, 500, 600))] + \
             [_run(3, s, 20000, "censored") for s in range(3)] + \
             [_run(2, s, 50, lr=0.5) for s in range(3)]               # another rate: its own curve
    spec = CellSpec(depth=4, seeds=(0, 1), learning_rate=0.1)
    assert median_t(stored[:3]) == 1000 and median_t(stored[6:9]) == math.inf
    assert early_budget(stored, spec, 3.0, 20000) == 1500
    assert early_budget(stored, spec, 100.0, 20000) is None           # not below the budget
    assert early_budget(stored, spec, None, 20000) is None
    assert early_budget([], spec, 3.0, 20000) is None


def test_tuning_objective_and_edge() -> None:
    runs = [_run(1, 0, 300), _run(1, 1, 500, "censored"), _run(1, 2, 70, "diverged")]
    assert tuning_objective(runs, 500, 2.0) == 1000.0            # median of 300, 1000, 2000
    tune = TuneConfig(low=1e-3, high=1.0)
    assert rate_at_edge(0.95, tune) and rate_at_edge(1.1e-3, tune) and not rate_at_edge(0.03, tune)


TUNE = """
name: tuned
data: {source: digits}
model: {width: 8}
sweep: {depths: [1, 2], seeds: 2, early_censor: 4}
train:
  learning_rate: {low: 0.005, high: 0.5, trials: 3, seeds: 2, also_fixed: [0.05]}
  max_updates: 300
  eval_every: 20
  converge_when: {train_loss_below: 0.6}
probes: {displacement: false, snr: false}
"""


def test_tuning_finds_a_rate_inside_its_bounds_and_records_every_trial(write_yaml, tmp_path: Path) -> None:
    cfg = load_config(write_yaml(TUNE))
    out = tmp_path / "res"
    summary = run_sweep(cfg, out=out, show_progress=False)
    assert set(summary.tuned_rates) == {1, 2}
    assert all(0.005 <= lr <= 0.5 for lr in summary.tuned_rates.values())
    with (out / "tuning.csv").open() as fh:
        trials = list(csv.DictReader(fh))
    assert len(trials) == 6 and {t["depth"] for t in trials} == {"1", "2"}
    storage = optuna.storages.RDBStorage(f"sqlite:///{out / 'store.db'}")
    for depth in (1, 2):
        study = optuna.load_study(study_name=f"tuned:tune:K{depth}", storage=storage)
        assert len(study.trials) == 3
        assert summary.tuned_rates[depth] == pytest.approx(study.best_params["learning_rate"])
    with (out / "runs.csv").open() as fh:
        rows = list(csv.DictReader(fh))
    assert {r["lr_mode"] for r in rows} == {"fixed", "tuned"} and len(rows) == 8
    assert any("early censoring stopped" in n for n in summary.notes)
    again = run_sweep(cfg, out=out, show_progress=False)           # resumes: no new trial, no new cell
    assert again.n_trained == 0 and again.tuned_rates == summary.tuned_rates


ADAPTIVE = """
name: rounds
data: {source: synthetic, n_samples: 300, n_features: 16}
model: {width: 16}
sweep:
  depths: {low: 1, high: 10, max_rounds: 2, extra_seeds: 1}
  seeds: 2
train: {learning_rate: 0.05, max_updates: 2000, eval_every: 20, converge_when: {train_loss_below: 0.4}}
probes: {displacement: false, snr: false}
"""


def test_adaptive_sweep_stores_its_rounds_and_resumes(write_yaml, tmp_path: Path) -> None:
    import json

    cfg = load_config(write_yaml(ADAPTIVE))
    out = tmp_path / "res"
    summary = run_sweep(cfg, out=out, show_progress=False)
    assert len(summary.rounds) == 2 and summary.rounds[-1]["stop"] and not summary.rounds[0]["stop"]
    info = json.loads((out / "sweep.json").read_text())
    assert info["rounds"] == summary.rounds
    first = {1, 2, 3, 5}                            # geometric from low to high / 2
    assert set(info["depths"]) == first | set(summary.rounds[0]["add_depths"])
    assert min(summary.rounds[0]["add_depths"]) > 5     # T still fell at 5: the policy went deeper
    with (out / "runs.csv").open() as fh:
        n_rows = sum(1 for _ in csv.DictReader(fh))
    assert n_rows == sum(info["seeds_per_depth"].values())
    again = run_sweep(cfg, out=out, show_progress=False)
    assert again.n_trained == 0 and again.rounds == summary.rounds
