"""loop.train_cell, the mlp family's trainer: its options (threads, eval_rows), seeds drawn from
their own streams, the stacked initial weights, and the memory of a large cell.

Its maths against autograd and torch.optim: tests/train/test_stacked.py; the per-cell loop it runs
on: tests/train/test_cell.py.
"""
from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import torch

from depthplan.config import ModelConfig, ProbeConfig
from depthplan.errors import ConfigError
from depthplan.records import CellSpec
from depthplan.train.loop import stacked_weights, train_cell
from depthplan.train.models import build_mlp
from trainer_setup import NO_PROBES, short_train


def test_results_depend_on_the_seed_alone(data) -> None:
    model, train = ModelConfig(width=8), short_train(80)
    a = train_cell(CellSpec(2, (5, 7), 0.05), model, train, ProbeConfig(n_points=5, snr_window=4), data)
    b = train_cell(CellSpec(2, (5, 7), 0.05), model, train, ProbeConfig(n_points=5, snr_window=4), data)
    c = train_cell(CellSpec(2, (7, 9, 5), 0.05), model, train, ProbeConfig(n_points=5, snr_window=4), data)
    for r, s in zip(a, b):
        assert (r.train_loss, r.displacement) == (s.train_loss, s.displacement)
        np.testing.assert_array_equal(r.snr_db, s.snr_db)      # NaN (below the window's floor) equals NaN
    np.testing.assert_allclose(a[0].train_loss, c[2].train_loss, rtol=1e-5)   # seed 5, other company
    np.testing.assert_allclose(a[1].displacement, c[0].displacement, rtol=1e-5)


def test_threads_are_restored(data) -> None:
    before = torch.get_num_threads()
    train_cell(CellSpec(1, (0,), 0.05), ModelConfig(width=4), short_train(20), NO_PROBES, data, threads=1)
    assert torch.get_num_threads() == before


def test_evaluation_subset_is_fixed_and_leaves_training_alone(data) -> None:
    # the subset itself (fixed rows, None for all): tests/train/test_batches.py
    n_rows = len(data.y_train)
    spec, model = CellSpec(2, (0, 1), 0.05), ModelConfig(width=8)
    probes = ProbeConfig(snr=False, n_points=5)
    full = train_cell(spec, model, short_train(60), probes, data, dtype=torch.float64)
    part = train_cell(spec, model, short_train(60), probes, data, dtype=torch.float64, eval_rows=50)
    every = train_cell(spec, model, short_train(60), probes, data, dtype=torch.float64, eval_rows=n_rows)
    assert [r.train_loss for r in every] == [r.train_loss for r in full]
    assert [r.displacement for r in part] == [r.displacement for r in full]   # same training
    assert all(p.train_loss != f.train_loss for p, f in zip(part, full))      # other rows scored
    with pytest.raises(ConfigError, match=r"train\.eval_rows"):
        train_cell(spec, model, short_train(20), probes, data, eval_rows=0)


def test_stacked_weights_are_each_seeds_nn_linear_weights_transposed() -> None:
    # reference: the weights of each seed's own nn.Sequential (models.build_mlp), as nn.Linear
    # stores them (out, in); the stack holds them (seed, in, out)
    model, seeds = ModelConfig(width=(6, 5)), (3, 0, 8)
    ws, bs = stacked_weights(model, 7, 2, 4, seeds, torch.float64)
    assert [w.shape for w in ws] == [(3, 7, 6), (3, 6, 5), (3, 5, 4)] and [b.shape for b in bs] == [(3, 1, 6),
                                                                                                     (3, 1, 5), (3, 1, 4)]
    for k, seed in enumerate(seeds):
        linears = [m for m in build_mlp(model, 7, 2, 4, seed, torch.float64) if isinstance(m, torch.nn.Linear)]
        for w, b, lin in zip(ws, bs, linears):
            assert torch.equal(w[k], lin.weight.T) and torch.equal(b[k, 0], lin.bias)


# --------------------------------------------------------------------------- memory

MEMORY_SCRIPT = """
    import json, resource, sys
    import numpy as np, torch
    from depthplan.config import ConvergeConfig, ModelConfig, ProbeConfig, TrainConfig
    from depthplan.train.datasets import Dataset
    from depthplan.records import CellSpec
    from depthplan.train.loop import train_cell
    rng = np.random.default_rng(0)
    x = rng.standard_normal((2000, 64)).astype(np.float32)
    y = rng.integers(0, 10, 2000)
    data = Dataset(x, y, x[:200], y[:200], 10, tuple("abcdefghij"), "noise")
    spec = CellSpec(depth=8, seeds=tuple(range(256)), learning_rate=0.05)
    train = TrainConfig(max_updates=20, eval_every=10, converge_when=ConvergeConfig(train_loss_below=1e-12))
    probe = ProbeConfig(n_points=3, snr_window=16)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    train_cell(spec, ModelConfig(width=32), train, probe, data)
    after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"before_kb": before, "after_kb": after}))
"""


def test_memory_at_256_seeds_depth_8_and_2000_rows_stays_under_1_gb() -> None:
    # peak resident set of a fresh process (Linux getrusage, kilobytes), torch included, after
    # one cell with probes and full-set evaluation
    root = Path(__file__).resolve().parents[2]
    out = subprocess.run([sys.executable, "-c", textwrap.dedent(MEMORY_SCRIPT)], capture_output=True, text=True,
                         cwd=root, timeout=300, check=True, env={"PYTHONPATH": str(root), "PATH": ""})
    peak = json.loads(out.stdout.strip().splitlines()[-1])
    grown_mb = (peak["after_kb"] - peak["before_kb"]) / 1024
    assert peak["after_kb"] / 1024 < 1024, f"peak {peak['after_kb'] / 1024:.0f} MB (training added {grown_mb:.0f} MB)"


