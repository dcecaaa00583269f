"""The maths of stacked seed networks (stacked.py) against autograd and torch.optim, seed by seed.

stacked.py has no public names: its pieces (`SeedStack`, `_Optimizer`, `draw_gradients`,
`gradient_snr_db_by_layer`, `_information`) are reached through `loop.train_cell` where that suffices, and
directly only where a check needs one minibatch's gradients (the SNR draws).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from depthplan.config import DataConfig, ModelConfig, ProbeConfig
from depthplan.information import binned_information
from depthplan.records import CellSpec
from depthplan.train.batches import INFORMATION_ROWS
from depthplan.train.datasets import load_dataset
from depthplan.train.loop import stacked_weights, train_cell
from depthplan.train.models import build_mlp
from depthplan.train.reference import probe_plain, train_plain
from depthplan.train.stacked import draw_gradients, gradient_snr_db_by_layer, SeedStack, tanh_
from trainer_setup import NO_PROBES, OPTIMIZERS, RATES, curves, short_train

pytestmark = pytest.mark.usefixtures("one_thread")     # tests/train/conftest.py


@pytest.mark.parametrize("dtype, atol", [(torch.float32, 2.4e-7), (torch.float64, 4.5e-16)])
def test_tanh_through_sigmoid_matches_the_library_tanh(dtype, atol) -> None:
    """`tanh_` (2 sigmoid(2z) - 1, faster on CPU) against Python's math.tanh, computed in double on
    every value, and against torch.tanh: within about one rounding step of 1.0 everywhere, exactly
    +-1 far out, odd, in place. The tolerances are those stated in tanh_'s docstring (our own)."""
    z = torch.cat([torch.linspace(-25.0, 25.0, 200_001, dtype=torch.float64),
                   torch.tensor([0.0, 1e-30, -1e-12, 1e-5, 400.0, -400.0], dtype=torch.float64)]).to(dtype)
    got = z.clone()
    assert tanh_(got) is got                                          # in place
    want = torch.tensor([math.tanh(v) for v in z.double().tolist()], dtype=torch.float64)
    assert (got.double() - want).abs().max().item() <= atol
    assert (got - torch.tanh(z)).abs().max().item() <= atol
    assert got[-2].item() == 1.0 and got[-1].item() == -1.0
    assert got.abs().max().item() <= 1.0
    assert torch.allclose(tanh_(-z.clone()), -got, rtol=0, atol=2 * atol)

#: Minibatch gradients per SNR window (the probes' default, `ProbeConfig.snr_window`).
WINDOW = 16


# --------------------------------------------------------------------------- forward, backward, optimisers

@pytest.mark.parametrize("dtype, rtol", [(torch.float64, 1e-12), (torch.float32, 1e-4)])
@pytest.mark.parametrize("name", OPTIMIZERS)
def test_every_seed_follows_the_plain_loop(data, name, dtype, rtol) -> None:
    # reference: nn.Sequential + autograd + torch.optim.SGD / torch.optim.Adam update rules, seed by seed
    lr = RATES[name]
    spec = CellSpec(depth=3, seeds=(0, 1, 2), learning_rate=lr)
    model = ModelConfig(width=16)
    train = short_train(learning_rate=(lr,), **OPTIMIZERS[name])
    batched = curves(train_cell(spec, model, train, NO_PROBES, data, dtype=dtype))
    plain = np.array(train_plain(spec, model, train, data, dtype=dtype))
    assert batched.shape == plain.shape == (3, 6)
    np.testing.assert_allclose(batched, plain, rtol=rtol)
    assert np.all(plain[:, -1] < plain[:, 0])              # it trained: the loss fell


@pytest.mark.parametrize("activation", ["tanh", "relu", "gelu", "sigmoid"])
def test_hand_written_backward_matches_autograd_for_every_activation(data, activation) -> None:
    # reference: torch.autograd through nn.Tanh / nn.ReLU / nn.GELU / nn.Sigmoid
    spec = CellSpec(depth=2, seeds=(3, 4), learning_rate=0.05)
    model = ModelConfig(width=8, activation=activation)
    train = short_train(60)
    batched = curves(train_cell(spec, model, train, NO_PROBES, data, dtype=torch.float64))
    np.testing.assert_allclose(batched, train_plain(spec, model, train, data, dtype=torch.float64), rtol=1e-12)


# --------------------------------------------------------------------------- probes

def test_snr_draws_match_autograd_gradients_draw_by_draw(data) -> None:
    # reference: torch.autograd weight gradients of nn.Sequential, one minibatch at a time
    model, seeds, n_draws, batch = ModelConfig(width=8), (0, 1), 3, 5
    x = torch.from_numpy(data.x_train).double()
    y = torch.from_numpy(data.y_train)
    stack = SeedStack(*stacked_weights(model, x.shape[1], 2, data.n_classes, seeds, torch.float64))
    rows = torch.arange(len(seeds) * n_draws * batch).view(len(seeds), -1) * 7 % len(y)
    onehot = F.one_hot(y, data.n_classes).double()
    grads = draw_gradients(stack, x[rows], onehot[rows].transpose(1, 2), "tanh", n_draws)
    for k, seed in enumerate(seeds):
        net = build_mlp(model, x.shape[1], 2, data.n_classes, seed, torch.float64)
        linears = [m for m in net if isinstance(m, torch.nn.Linear)]
        for j in range(n_draws):
            part = rows[k, j * batch:(j + 1) * batch]
            net.zero_grad()
            F.cross_entropy(net(x[part]), y[part]).backward()
            for layer, lin in enumerate(linears):
                np.testing.assert_allclose(grads[layer][j, k].numpy(), lin.weight.grad.T.numpy(), rtol=1e-10, atol=1e-14)


def test_tool_snr_matches_autograd_full_batch_signal_and_per_example_noise() -> None:
    # Reference: torch.autograd on nn.Sequential with the same weights. A minibatch of B rows drawn
    # uniformly with replacement has mean gradient G (the full-batch gradient) and covariance
    # Sigma_ex / B (Sigma_ex the per-example gradient covariance over the training set), so the
    # true SNR is ||G||^2 / (tr Sigma_ex / B).
    data = load_dataset(DataConfig(source="synthetic", n_samples=400, n_features=12, n_classes=3))
    x = torch.from_numpy(data.x_train).double()
    y = torch.from_numpy(data.y_train)
    net = build_mlp(ModelConfig(width=8), x.shape[1], 2, data.n_classes, 0, torch.float64)
    linears = [m for m in net if isinstance(m, torch.nn.Linear)]
    per_example = [[] for _ in linears]
    for i in range(len(y)):
        net.zero_grad()
        F.cross_entropy(net(x[i:i + 1]), y[i:i + 1]).backward()
        for layer, lin in enumerate(linears):
            per_example[layer].append(lin.weight.grad.reshape(-1).clone())

    # The tool: the same weights stacked n_windows times, one independent window per "seed".
    n_windows, batch = 400, 8
    ws = [lin.weight.detach().T.expand(n_windows, -1, -1).contiguous() for lin in linears]
    bs = [lin.bias.detach().view(1, 1, -1).expand(n_windows, -1, -1).contiguous() for lin in linears]
    rows = np.random.default_rng(3).integers(0, len(y), (n_windows, WINDOW, batch))
    onehot = F.one_hot(y, data.n_classes).double()
    tool = gradient_snr_db_by_layer(SeedStack(ws, bs), x, onehot, rows, "tanh")

    for layer, grads in enumerate(per_example):
        p = torch.stack(grads).numpy()
        full = p.mean(axis=0)
        true_db = 10 * math.log10((full ** 2).sum() / (((p - full) ** 2).sum(axis=1).mean() / batch))
        est = tool[layer]
        assert np.isfinite(est).all()          # at initialisation the SNR is well above the floor
        # Tolerance from the window: the per-window spread sigma at n = 16 (measured: IQR / 1.349 for
        # a normal) gives the median of n_windows windows a standard error of 1.2533 sigma / sqrt(n_windows)
        # (asymptotic variance of a normal sample median); allow 4 of them, plus 0.3 dB for the
        # median of a right-skewed quadratic form sitting below its mean.
        q75, q25 = np.percentile(est, [75, 25])
        tol = 4 * 1.2533 * (q75 - q25) / 1.349 / math.sqrt(n_windows) + 0.3
        assert abs(np.median(est) - true_db) < tol, (layer, np.median(est), true_db, tol)


def test_information_probe_at_t_equals_the_estimator_on_the_plain_network(data) -> None:
    # reference: the plain per-seed network (nn.Sequential + torch.optim) at the same T, its layer
    # outputs taken module by module, put through the same binning estimator (checked against
    # closed forms and scikit-learn in tests/test_information.py)
    model, spec = ModelConfig(width=8), CellSpec(depth=2, seeds=(0, 1), learning_rate=0.05)
    train = short_train(60)
    probes = ProbeConfig(n_points=5, snr_window=4, information=True, information_bins=10)
    results = train_cell(spec, model, train, probes, data, dtype=torch.float64)
    plain = probe_plain(spec, model, train, probes, data, dtype=torch.float64)
    x_info = torch.from_numpy(data.x_train).double()
    y_info = data.y_train
    assert len(x_info) <= INFORMATION_ROWS              # the probe's fixed batch is the whole training set
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
