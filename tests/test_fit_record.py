"""FitResult, the typed form of fit.json: reading and writing back gives the same bytes."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from depthplan.fit_record import ABSENT, FitResult, PowerLaw, Reversal
from depthplan.fitting import fit_path, fit_runs
from depthplan.records import RunResult

ROOT = Path(__file__).resolve().parents[1]


def _dump(d: dict) -> str:
    # the writer's own serialisation (fitting.assemble.fit_path)
    return json.dumps(d, indent=2, allow_nan=False) + "\n"


def _runs(rates: tuple[float, ...], seed: int = 3) -> list[RunResult]:
    # invented runs: T = 9000 K^-1 + 60 K with 10 % log-normal noise, some censored at 6000
    rng = np.random.default_rng(seed)
    out = []
    for lr in rates:
        for k in (1, 2, 3, 4, 6, 8, 12, 16, 24):
            for s in range(4):
                t = (9000 / k + 60 * k) * (0.02 / lr) * float(np.exp(rng.normal(0, 0.1)))
                status = "censored" if t > 6000 else "converged"
                out.append(RunResult(depth=k, width=16, seed=s, learning_rate=lr, status=status,
                                     iterations=int(min(t, 6000)), wall_seconds=1.0,
                                     seconds_per_update=1e-5 * (1 + 0.5 * k), final_train_loss=0.1,
                                     final_train_accuracy=1.0, validation_accuracy=0.9, n_params=100))
    return out


def test_committed_demo_fit_round_trips_byte_for_byte():
    text = (ROOT / "results" / "demo" / "fit.json").read_text(encoding="utf-8")
    result = FitResult.from_dict(json.loads(text))
    assert _dump(result.to_dict()) == text
    # attributes, not string keys (values read from the same file)
    raw = json.loads(text)
    assert result.power_law.slope == raw["power_law"]["slope"]
    assert result.reversal.status == raw["reversal"]["status"]
    assert result.planning.compute_optimal_depth.depth == raw["planning"]["compute_optimal_depth"]["depth"]
    assert result.per_depth[0].median == raw["per_depth"][0]["median"]


@pytest.mark.parametrize("rates", [(0.02,), (0.01, 0.02, 0.04)])
def test_fresh_fits_round_trip(rates, tmp_path):
    fit = fit_runs(_runs(rates), n_boot=40)
    result = FitResult.from_dict(fit)
    assert _dump(result.to_dict()) == _dump(fit)
    assert len(result.groups) == len(rates)
    assert all(isinstance(g.power_law, PowerLaw) for g in result.groups)
    assert isinstance(result.reversal, Reversal)


def test_fit_path_output_round_trips(tmp_path):
    table = tmp_path / "t.csv"
    rows = ["depth,iterations,seed"] + [f"{r.depth},{r.iterations},{r.seed}" for r in _runs((0.02,))
                                         if r.status == "converged"]
    table.write_text("\n".join(rows) + "\n")
    _, out = fit_path(table, n_boot=40)
    text = out.read_text(encoding="utf-8")
    assert _dump(FitResult.from_dict(json.loads(text)).to_dict()) == text


def test_unknown_keys_kept_and_missing_ones_not_invented():
    d = {"schema": "depthplan-fit/1", "power_law": {"slope": -1.0, "future_field": [1, 2]}, "later": 3}
    r = FitResult.from_dict(d)
    assert r.power_law.slope == -1.0 and r.power_law.alpha is ABSENT and r.reversal is ABSENT
    assert r.to_dict() == d and list(r.to_dict()) == list(d)


def test_records_are_frozen():
    r = FitResult.from_dict({"schema": "depthplan-fit/1"})
    with pytest.raises(AttributeError):
        r.schema = "other"
