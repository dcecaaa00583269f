"""The batched trainer against a plain per-seed PyTorch loop, seeds leaving the batch, probes, memory."""
from __future__ import annotations

import json
import math
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from depthplan.config import ConvergeConfig, DataConfig, ModelConfig, ProbeConfig, TrainConfig
from depthplan.train.datasets import load_dataset
from depthplan.errors import ConfigError
from depthplan.train.models import build_mlp
from depthplan.records import CellSpec
from depthplan.train.stacked import _draw_gradients, _Stack
from depthplan.train.loop import BatchStream, _eval_subset, stacked_weights, train_cell
from depthplan.train.reference import probe_plain, train_plain

NO_PROBES = ProbeConfig(displacement=False, snr=False)
NEVER = ConvergeConfig(train_loss_below=1e-12)


@pytest.fixture(scope="module")
def data():
    return load_dataset(DataConfig(source="synthetic", n_samples=400, n_features=12, n_classes=3))


def _train(n_updates: int = 120, **kw) -> TrainConfig:
    return TrainConfig(**{"learning_rate": (0.05,), "max_updates": n_updates, "eval_every": 20,
                          "converge_when": NEVER, **kw})


def _curves(results) -> np.ndarray:
    return np.array([r.train_loss for r in results])


# --------------------------------------------------------------------------- equal to the plain loop

OPTIMIZERS = {"sgd": dict(optimizer="sgd"), "momentum": dict(optimizer="sgd", momentum=0.9),
              "adam": dict(optimizer="adam")}
RATES = {"sgd": 0.05, "momentum": 0.01, "adam": 0.005}


@pytest.mark.parametrize("dtype, rtol", [(torch.float64, 1e-12), (torch.float32, 1e-4)])
@pytest.mark.parametrize("name", OPTIMIZERS)
def test_every_seed_follows_the_plain_loop(data, name, dtype, rtol) -> None:
    # reference: nn.Sequential + autograd + torch.optim.SGD / torch.optim.Adam update rules, seed by seed
    lr = RATES[name]
    spec = CellSpec(depth=3, seeds=(0, 1, 2), learning_rate=lr)
    model = ModelConfig(width=16)
    train = _train(learning_rate=(lr,), **OPTIMIZERS[name])
    batched = _curves(train_cell(spec, model, train, NO_PROBES, data, dtype=dtype))
    plain = np.array(train_plain(spec, model, train, data, dtype=dtype))
    assert batched.shape == plain.shape == (3, 6)
    np.testing.assert_allclose(batched, plain, rtol=rtol)
    assert np.all(plain[:, -1] < plain[:, 0])              # it trained: the loss fell


@pytest.mark.parametrize("activation", ["tanh", "relu", "gelu", "sigmoid"])
def test_hand_written_backward_matches_autograd_for_every_activation(data, activation) -> None:
    # reference: torch.autograd through nn.Tanh / nn.ReLU / nn.GELU / nn.Sigmoid
    spec = CellSpec(depth=2, seeds=(3, 4), learning_rate=0.05)
    model = ModelConfig(width=8, activation=activation)
    train = _train(60)
    batched = _curves(train_cell(spec, model, train, NO_PROBES, data, dtype=torch.float64))
    np.testing.assert_allclose(batched, train_plain(spec, model, train, data, dtype=torch.float64), rtol=1e-12)


def test_snr_draws_match_autograd_gradients_draw_by_draw(data) -> None:
    # reference: torch.autograd weight gradients of nn.Sequential, one minibatch at a time
    model, seeds, n_draws, batch = ModelConfig(width=8), (0, 1), 3, 5
    x = torch.from_numpy(data.x_train).double()
    y = torch.from_numpy(data.y_train)
    stack = _Stack(*stacked_weights(model, x.shape[1], 2, data.n_classes, seeds, torch.float64))
    rows = torch.arange(len(seeds) * n_draws * batch).view(len(seeds), -1) * 7 % len(y)
    onehot = F.one_hot(y, data.n_classes).double()
    grads = _draw_gradients(stack, x[rows], onehot[rows].transpose(1, 2), "tanh", n_draws)
    for k, seed in enumerate(seeds):
        net = build_mlp(model, x.shape[1], 2, data.n_classes, seed, torch.float64)
        linears = [m for m in net if isinstance(m, torch.nn.Linear)]
        for j in range(n_draws):
            part = rows[k, j * batch:(j + 1) * batch]
            net.zero_grad()
            F.cross_entropy(net(x[part]), y[part]).backward()
            for layer, lin in enumerate(linears):
                np.testing.assert_allclose(grads[layer][j, k].numpy(), lin.weight.grad.T.numpy(), rtol=1e-10, atol=1e-14)


# --------------------------------------------------------------------------- seeds leaving the batch

@pytest.mark.parametrize("name", OPTIMIZERS)
def test_a_seed_that_converges_leaves_and_the_others_train_as_if_alone(data, monkeypatch, name) -> None:
    model, seeds, lr = ModelConfig(width=16), (0, 1, 2), RATES[name]
    free = _curves(train_cell(CellSpec(2, seeds, lr), model, _train(200, learning_rate=(lr,), **OPTIMIZERS[name]),
                              NO_PROBES, data, dtype=torch.float64))
    # a threshold the fastest seed meets by the second evaluation while the others are still above it
    fast = int(np.argmin(free[:, 1]))
    others_best = min(free[s, :2].min() for s in range(3) if s != fast)
    assert free[fast, 1] < others_best
    train = _train(200, learning_rate=(lr,), **OPTIMIZERS[name],
                   converge_when=ConvergeConfig(train_loss_below=float(free[fast, 1] + others_best) / 2))

    seeds_per_step: list[int] = []
    forward = _Stack.forward
    monkeypatch.setattr(_Stack, "forward", lambda self, x, act: (seeds_per_step.append(x.shape[0]), forward(self, x, act))[1])
    together = train_cell(CellSpec(2, seeds, lr), model, train, NO_PROBES, data, dtype=torch.float64)
    assert together[fast].status == "converged" and together[fast].iterations <= 40
    assert seeds_per_step[0] == 3 and min(seeds_per_step) < 3    # the batch shrank once a seed was done

    for k, seed in enumerate(seeds):
        alone = train_cell(CellSpec(2, (seed,), lr), model, train, NO_PROBES, data, dtype=torch.float64)[0]
        assert (alone.status, alone.iterations, alone.eval_steps) == (together[k].status, together[k].iterations,
                                                                      together[k].eval_steps)
        np.testing.assert_allclose(alone.train_loss, together[k].train_loss, rtol=1e-12)
        # reference: the plain per-seed loop stopping at the same rule
        plain = train_plain(CellSpec(2, (seed,), lr), model, train, data, dtype=torch.float64, until_converged=True)
        assert len(plain[0]) * train.eval_every == alone.iterations


def test_a_diverging_seed_is_marked_and_leaves_the_others_alone(data) -> None:
    model, train = ModelConfig(width=8, activation="relu", init_gain=3.0), _train(100, learning_rate=(1e3,))
    results = train_cell(CellSpec(2, (0, 1), 1e3), model, train, NO_PROBES, data)   # float32 overflows
    bad = [r for r in results if r.status == "diverged"]
    assert len(bad) == 1 and bad[0].iterations == 20 and not math.isfinite(bad[0].final_train_loss)
    good = next(r for r in results if r.status != "diverged")
    alone = train_cell(CellSpec(2, (good.seed,), 1e3), model, train, NO_PROBES, data)[0]
    assert good.iterations == alone.iterations == 100
    np.testing.assert_allclose(good.train_loss, alone.train_loss, rtol=1e-5)


def test_results_depend_on_the_seed_alone(data) -> None:
    model, train = ModelConfig(width=8), _train(80)
    a = train_cell(CellSpec(2, (5, 7), 0.05), model, train, ProbeConfig(n_points=5, snr_window=4), data)
    b = train_cell(CellSpec(2, (5, 7), 0.05), model, train, ProbeConfig(n_points=5, snr_window=4), data)
    c = train_cell(CellSpec(2, (7, 9, 5), 0.05), model, train, ProbeConfig(n_points=5, snr_window=4), data)
    for r, s in zip(a, b):
        assert (r.train_loss, r.displacement) == (s.train_loss, s.displacement)
        np.testing.assert_array_equal(r.snr_db, s.snr_db)      # NaN (below the window's floor) equals NaN
    np.testing.assert_allclose(a[0].train_loss, c[2].train_loss, rtol=1e-5)   # seed 5, other company
    np.testing.assert_allclose(a[1].displacement, c[0].displacement, rtol=1e-5)


# --------------------------------------------------------------------------- records, probes, options

def test_records_probes_and_progress(data) -> None:
    done: list[int] = []
    spec = CellSpec(depth=3, seeds=(0, 1), learning_rate=0.05)
    results = train_cell(spec, ModelConfig(width=8), _train(100), ProbeConfig(n_points=6, snr_window=4), data,
                         progress=done.append)
    assert sum(done) == 2 * 100
    for r in results:
        assert r.status == "censored" and r.iterations == 100 and r.eval_steps == (20, 40, 60, 80, 100)
        assert r.n_params == 12 * 8 + 8 + 2 * (8 * 8 + 8) + 8 * 3 + 3
        assert len(r.displacement) == len(r.snr_db) == 4                      # one series per layer
        assert all(len(d) == len(r.probe_steps) for d in r.displacement)
        assert all(len(d) == len(r.snr_steps) for d in r.snr_db)
        assert set(r.snr_steps) <= set(r.probe_steps) and len(r.snr_steps) < len(r.probe_steps)
        assert r.probe_steps[0] == r.snr_steps[0] == 1 and r.probe_steps[-1] == r.snr_steps[-1] == 100
        assert all(np.diff(d).min() > -1e-6 for d in r.displacement[:1])    # the first layer moves away
        # a value is measured or NaN (below the floor of a 4-draw window), never infinite
        assert not any(math.isinf(v) for d in r.snr_db for v in d)
        assert any(math.isfinite(v) for d in r.snr_db for v in d)
        assert 0.0 <= r.validation_accuracy <= 1.0 and r.wall_seconds > 0


def test_threads_are_restored(data) -> None:
    before = torch.get_num_threads()
    train_cell(CellSpec(1, (0,), 0.05), ModelConfig(width=4), _train(20), NO_PROBES, data, threads=1)
    assert torch.get_num_threads() == before


def test_evaluation_subset_is_fixed_and_leaves_training_alone(data) -> None:
    n_rows = len(data.y_train)
    sub = _eval_subset(n_rows, 50)
    assert len(sub) == 50 and len(set(sub.tolist())) == 50 and torch.equal(sub, _eval_subset(n_rows, 50))
    assert _eval_subset(n_rows, n_rows) is None and _eval_subset(n_rows, None) is None
    spec, model = CellSpec(2, (0, 1), 0.05), ModelConfig(width=8)
    probes = ProbeConfig(snr=False, n_points=5)
    full = train_cell(spec, model, _train(60), probes, data, dtype=torch.float64)
    part = train_cell(spec, model, _train(60), probes, data, dtype=torch.float64, eval_rows=50)
    every = train_cell(spec, model, _train(60), probes, data, dtype=torch.float64, eval_rows=n_rows)
    assert [r.train_loss for r in every] == [r.train_loss for r in full]
    assert [r.displacement for r in part] == [r.displacement for r in full]   # same training
    assert all(p.train_loss != f.train_loss for p, f in zip(part, full))      # other rows scored
    with pytest.raises(ConfigError, match=r"train\.eval_rows"):
        train_cell(spec, model, _train(20), probes, data, eval_rows=0)


def test_batch_stream_shuffles_whole_epochs() -> None:
    s = BatchStream(seed=3, n_rows=50, batch_size=8)
    rows = s.take(12)                     # 6 full batches per epoch (48 of 50 rows), two epochs
    assert rows.shape == (12, 8)
    for epoch in (rows[:6], rows[6:]):
        assert len(set(epoch.ravel().tolist())) == 48
    assert not np.array_equal(rows[:6], rows[6:])
    assert np.array_equal(BatchStream(3, 50, 8).take(12), rows)


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


def _probe_plain_one_thread(*args) -> list[dict]:
    """`probe_plain` in float64 on one torch thread, as train_cell runs (a second thread on a busy
    core makes autograd's small steps many times slower)."""
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        return probe_plain(*args, dtype=torch.float64)
    finally:
        torch.set_num_threads(threads)


def test_probes_end_at_each_seeds_own_t_on_digits_and_match_the_plain_loop() -> None:
    # A tiny real run: scikit-learn's digits (UCI, 1,797 8x8 images; DESIGN.md section 3), seeds
    # trained together that converge at different T. Each seed's probes must end at its own T
    # (the schedule before ended up to a third of T early), and the plain per-seed loop
    # (nn.Sequential + torch.optim, reference) must record the same probe steps and displacements.
    data = load_dataset(DataConfig(source="digits"))
    model, spec = ModelConfig(width=16), CellSpec(depth=1, seeds=(0, 1, 2), learning_rate=0.1)
    train = TrainConfig(learning_rate=(0.1,), max_updates=2000, eval_every=10,
                        converge_when=ConvergeConfig(train_loss_below=0.5))
    probes = ProbeConfig(n_points=12, snr_window=4)
    results = train_cell(spec, model, train, probes, data, dtype=torch.float64)
    assert all(r.status == "converged" for r in results) and len({r.iterations for r in results}) > 1
    for r in results:
        assert r.probe_steps[-1] == r.snr_steps[-1] == r.iterations < train.max_updates
        assert r.probe_steps[0] == 1 and list(r.probe_steps) == sorted(set(r.probe_steps))
        assert sum(s >= r.iterations / 2 for s in r.probe_steps) >= 3       # a late window to fit
    plain = _probe_plain_one_thread(spec, model, train, probes, data)
    for r, p in zip(results, plain):
        assert (p["status"], p["iterations"], tuple(p["probe_steps"])) == (r.status, r.iterations, r.probe_steps)
        np.testing.assert_allclose(r.displacement, p["displacement"], rtol=1e-9)


def test_information_probe_at_t_equals_the_estimator_on_the_plain_network(data) -> None:
    # reference: the plain per-seed network (nn.Sequential + torch.optim) at the same T, its layer
    # outputs taken module by module, put through the same binning estimator (checked against
    # closed forms and scikit-learn in tests/test_information.py)
    from depthplan.information import binned_information
    from depthplan.train.loop import INFORMATION_ROWS

    model, spec = ModelConfig(width=8), CellSpec(depth=2, seeds=(0, 1), learning_rate=0.05)
    train = _train(60)
    probes = ProbeConfig(n_points=5, snr_window=4, information=True, information_bins=10)
    results = train_cell(spec, model, train, probes, data, dtype=torch.float64)
    plain = _probe_plain_one_thread(spec, model, train, probes, data)
    x = torch.from_numpy(data.x_train).double()
    rows = _eval_subset(len(x), INFORMATION_ROWS)
    x_info, y_info = (x, data.y_train) if rows is None else (x[rows], data.y_train[rows.numpy()])
    for r, p in zip(results, plain):
        assert r.snr_steps[-1] == r.iterations == p["iterations"] == 60
        assert len(r.information_xt) == len(r.information_ty) == 3
        assert all(len(v) == len(r.snr_steps) for v in r.information_xt + r.information_ty)
        outs, h = [], x_info
        with torch.no_grad():
            for m in p["net"]:
                h = m(h)
                if not isinstance(m, torch.nn.Linear):
                    outs.append(h)                          # each hidden layer's activations
            outs.append(torch.softmax(h, dim=1))            # the output layer's softmax
        for j, o in enumerate(outs):
            i_xt, i_ty = binned_information(o.numpy(), y_info, 10)
            assert r.information_xt[j][-1] == pytest.approx(i_xt, abs=1e-9)
            assert r.information_ty[j][-1] == pytest.approx(i_ty, abs=1e-9)
