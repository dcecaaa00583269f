"""The cost basis of the compute-optimal depth: analytic FLOPs by default, measured seconds on request.

Every data set here is invented (seeded synthetic runs from a known law, with invented timings);
the reference values come from elementary calculus: T = c K^s times a cost u + v K is lowest
at K* = -s u / ((1 + s) v).
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from depthplan import fitting as F
from depthplan.cli import build_parser, main
from depthplan.fitting import cost as C
from depthplan.records import RunResult, write_runs_jsonl

DEPTHS = (1, 2, 3, 4, 6, 8, 12, 16, 24, 32)
SHAPE = {"n_inputs": 256, "n_classes": 10, "batch_size": 32}
WIDTH = 32
# invented timings of a CPU whose fixed cost per update (16 us) dwarfs its cost per layer (1 us)
OVERHEAD_S, PER_LAYER_S = 16e-6, 1e-6


def _runs(slope: float = -0.6, seed: int = 5, network: bool = True) -> list[RunResult]:
    rng = np.random.default_rng(seed)
    out = []
    for k in DEPTHS:
        for s in range(4):
            t = 20000 * k ** slope * math.exp(rng.normal(0, 0.02))
            extra = {"network": {**SHAPE, "widths": [WIDTH] * k}} if network else {}
            out.append(RunResult(depth=k, width=WIDTH, seed=s, learning_rate=0.05, status="converged",
                                 iterations=int(t), wall_seconds=math.nan,
                                 seconds_per_update=(OVERHEAD_S + PER_LAYER_S * k) * math.exp(rng.normal(0, 0.01)),
                                 final_train_loss=0.1, final_train_accuracy=1.0, validation_accuracy=0.9,
                                 n_params=0, extra=extra))
    return out


def _k_star(s: float, u: float, v: float) -> float:
    return -s * u / ((1 + s) * v)     # elementary calculus (see the module docstring)


def test_flop_line_is_the_count_of_the_network_as_built():
    # 6 B sum(a b) - 2 B a_1 b_1 for 256 -> 32 x K -> 10 at batch 32, worked by hand
    net = {**SHAPE, "width": WIDTH, "widths": None}
    model = C.flop_cost_model(net)
    B, a, w, c = 32, 256, 32, 10
    by_hand = lambda k: 6 * B * (a * w + (k - 1) * w * w + w * c) - 2 * B * a * w
    assert model["per_layer"] == 6 * B * w * w
    for k in (1, 2, 7, 40):
        assert C.cost_per_update(model, [k])[0] == pytest.approx(by_hand(k))
        assert C.network_flops(net, k) == by_hand(k)


def test_overhead_dominated_timings_do_not_move_the_default_answer(tmp_path: Path):
    folder = tmp_path / "sweep"
    folder.mkdir()
    write_runs_jsonl(_runs(), folder / "runs.jsonl")
    flops, _ = F.fit_path(folder, n_boot=60)
    seconds, _ = F.fit_path(folder, tmp_path / "seconds.json", n_boot=60, cost="seconds")
    s = flops["power_law"]["slope"]
    model = flops["planning"]["compute_optimal_depth"]["cost_model"]
    # FLOP basis: K* from the network's own count, about 7 for this shape
    assert flops["planning"]["cost_basis"] == "flops"
    k_flops = _k_star(s, model["intercept"], model["per_layer"])
    assert 5 < k_flops < 9
    assert abs(flops["planning"]["compute_optimal_depth"]["depth"] - k_flops) <= 1
    assert flops["planning"]["recommended_depth"] == flops["planning"]["compute_optimal_depth"]["depth"]
    assert "floating-point operations" in flops["planning"]["recommended_basis"]
    # seconds basis: follows the overhead, K* about 24, and says it is this machine's timing
    line = seconds["planning"]["compute_optimal_depth"]["cost_model"]
    assert seconds["planning"]["cost_basis"] == "seconds" and line["basis"] == "seconds"
    assert line["source"].startswith("this machine's measured seconds")
    assert line["seconds_intercept"] == pytest.approx(OVERHEAD_S, rel=0.1)
    k_sec = _k_star(s, line["seconds_intercept"], line["seconds_per_layer"])
    assert 18 < k_sec < 32
    assert abs(seconds["planning"]["compute_optimal_depth"]["depth"] - k_sec) <= 1
    assert seconds["planning"]["compute_optimal_depth"]["depth"] > 2 * flops["planning"]["compute_optimal_depth"]["depth"]
    text = F.format_summary(seconds)
    assert "this machine's measured seconds per update" in text and "--cost seconds" in text
    assert "analytic FLOP count" in F.format_summary(flops)


def test_without_a_recorded_shape_proxy_timings_are_not_used_unless_asked():
    fit = F.fit_runs(_runs(network=False), n_boot=40)
    opt = fit["planning"]["compute_optimal_depth"]
    assert fit["planning"]["cost_basis"] == "none" and opt["depth"] is None
    assert "--cost seconds" in opt["note"]
    asked = F.fit_runs(_runs(network=False), n_boot=40, cost="seconds")
    assert asked["planning"]["cost_basis"] == "seconds"


def _table(tmp_path: Path, columns: str, row) -> Path:
    rng = np.random.default_rng(9)
    lines = [columns]
    for k in DEPTHS:
        for s in range(3):
            t = int(20000 * k ** -0.6 * math.exp(rng.normal(0, 0.02)))
            lines.append(row(k, s, t))
    path = tmp_path / "jobs.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def test_a_table_uses_its_shape_else_its_own_seconds_else_says_none(tmp_path: Path):
    sec = lambda k: f"{OVERHEAD_S + PER_LAYER_S * k:.3e}"
    shaped = _table(tmp_path, "depth,iterations,seed,seconds_per_update,width,n_inputs,n_classes,batch_size",
                    lambda k, s, t: f"{k},{t},{s},{sec(k)},{WIDTH},256,10,32")
    fit, _ = F.fit_path(shaped, n_boot=40)
    assert fit["planning"]["cost_basis"] == "flops"
    assert fit["planning"]["compute_optimal_depth"]["cost_model"]["n_inputs"] == 256
    timed = _table(tmp_path, "depth,iterations,seed,seconds_per_update",
                   lambda k, s, t: f"{k},{t},{s},{sec(k)}")
    fit, _ = F.fit_path(timed, n_boot=40)
    model = fit["planning"]["compute_optimal_depth"]["cost_model"]
    assert fit["planning"]["cost_basis"] == "seconds"          # the user's own timings of their jobs
    assert model["source"] == "the seconds per update given in the measurements table"
    bare = _table(tmp_path, "depth,iterations,seed", lambda k, s, t: f"{k},{t},{s}")
    fit, _ = F.fit_path(bare, n_boot=40)
    assert fit["planning"]["cost_basis"] == "none"
    assert fit["planning"]["compute_optimal_depth"]["depth"] is None
    assert "no cost per update" in fit["planning"]["compute_optimal_depth"]["note"]


def test_network_of_merges_runs_and_refuses_disagreement():
    def r(widths, **shape):
        return RunResult(depth=len(widths), width=widths[0], seed=0, learning_rate=0.1, status="converged",
                         iterations=10, wall_seconds=0.0, seconds_per_update=0.0, final_train_loss=0.0,
                         final_train_accuracy=0.0, validation_accuracy=0.0, n_params=0,
                         extra={"network": {**SHAPE, **shape, "widths": widths}})
    assert C.network_of([r([8]), r([8, 8, 8])]) == {**SHAPE, "width": 8, "widths": None}
    uneven = C.network_of([r([8]), r([8, 6, 4])])
    assert uneven["widths"] == [8, 6, 4] and uneven["width"] is None
    assert C.network_of([r([8]), r([9, 9])]) is None              # first layer differs
    assert C.network_of([r([8]), r([8, 8], batch_size=64)]) is None
    # an uneven network is only defined up to its widths list: the search stops there
    model = C.flop_cost_model(uneven)
    assert model["max_depth"] == 3 and math.isnan(C.cost_per_update(model, [4])[0])
    per_update = [C.network_flops(uneven, k) for k in (1, 2, 3)]
    # K^-2 (u + v K) still falls at K = 3, so no minimum within the defined depths
    assert math.isnan(F.compute_optimal_depth("power_law", [[5.0, -2.0]], per_update)[0])
    # while a rising law (s = +0.5) is cheapest at the shallowest depth
    assert F.compute_optimal_depth("power_law", [[5.0, 0.5]], per_update)[0] == 1


def test_cost_option_in_the_cli(tmp_path: Path, capsys: pytest.CaptureFixture):
    fit_parser = build_parser()._subparsers._group_actions[0].choices["fit"]
    choices = next(a.choices for a in fit_parser._actions if a.dest == "cost")
    assert tuple(choices) == C.COST_BASES
    table = _table(tmp_path, "depth,iterations,seed", lambda k, s, t: f"{k},{t},{s}")
    assert main(["fit", str(table), "--cost", "banana"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--cost" in err and "banana" in err
    assert not (tmp_path / "jobs.fit.json").exists()
    assert main(["fit", str(table), "--cost", "seconds", "--bootstrap", "40"]) == 0
    fit = json.loads((tmp_path / "jobs.fit.json").read_text())
    assert fit["planning"]["cost_basis"] == "none"       # asked for seconds, but the table has none
    assert "fewer than two depths" in fit["planning"]["compute_optimal_depth"]["note"]
