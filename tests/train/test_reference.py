"""The plain per-seed reference loop (reference.py), which the trainers are tested against, checked
in turn against a textbook loop: the update rules written out from their published form, with no
torch.optim, on each seed's own module and minibatch order.

Sources of the rules: torch.optim.SGD's documentation (momentum buffer b_1 = g, b_t = mu b_{t-1} + g,
p -= lr b_t; no dampening, no Nesterov) and Kingma and Ba 2015, "Adam", Algorithm 1 (beta1 0.9,
beta2 0.999, eps 1e-8 added to the square root of the corrected second moment, as torch.optim.Adam).
"""
from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from depthplan.config import ConvergeConfig, ModelConfig, ProbeConfig
from depthplan.records import CellSpec
from depthplan.train.batches import BatchStream
from depthplan.train.families import build_network
from depthplan.train.models import build_mlp
from depthplan.train.probes import probe_grids
from depthplan.train.reference import probe_plain, train_plain
from trainer_setup import OPTIMIZERS, RATES, short_train

pytestmark = pytest.mark.usefixtures("one_thread")     # tests/train/conftest.py


def _textbook(net: torch.nn.Module, data, seed: int, opt: str, lr: float, mu: float, n_updates: int,
              eval_every: int, batch: int) -> list[float]:
    """The full-training-set loss every `eval_every` updates, each update written out by hand."""
    x, y = torch.from_numpy(data.x_train).double(), torch.from_numpy(data.y_train)
    params = list(net.parameters())
    m = [torch.zeros_like(p) for p in params]
    v = [torch.zeros_like(p) for p in params]
    stream, losses = BatchStream(seed, len(y), batch), []
    for t in range(1, n_updates + 1):
        rows = torch.from_numpy(stream.take(1)[0])
        grads = torch.autograd.grad(F.cross_entropy(net(x[rows]), y[rows]), params)
        with torch.no_grad():
            for p, g, m_i, v_i in zip(params, grads, m, v):
                if opt == "adam":
                    m_i.mul_(0.9).add_(0.1 * g)
                    v_i.mul_(0.999).add_(0.001 * g * g)
                    p -= lr * (m_i / (1 - 0.9 ** t)) / ((v_i / (1 - 0.999 ** t)).sqrt() + 1e-8)
                elif mu:
                    m_i.copy_(g if t == 1 else mu * m_i + g)
                    p -= lr * m_i
                else:
                    p -= lr * g
        if t % eval_every == 0:
            with torch.no_grad():
                losses.append(float(F.cross_entropy(net(x), y)))
    return losses


@pytest.mark.parametrize("name", OPTIMIZERS)
def test_train_plain_is_the_textbook_loop(data, name) -> None:
    lr, spec, model = RATES[name], CellSpec(depth=2, seeds=(0, 3), learning_rate=RATES[name]), ModelConfig(width=8)
    train = short_train(60, learning_rate=(lr,), **OPTIMIZERS[name])
    plain = train_plain(spec, model, train, data, dtype=torch.float64)
    for seed, losses in zip(spec.seeds, plain):
        net = build_mlp(model, data.n_features, 2, data.n_classes, seed, torch.float64)
        book = _textbook(net, data, seed, train.optimizer, lr, train.momentum, 60, 20, train.batch_size)
        np.testing.assert_allclose(losses, book, rtol=1e-10)
        assert len(losses) == 3 and losses[-1] < losses[0]


def test_train_plain_builds_any_familys_module(data) -> None:
    # the residual family through families.build_network, plain SGD written out by hand
    model, spec = ModelConfig(width=8, family="residual", norm="layer"), CellSpec(2, (1,), 0.05)
    plain = train_plain(spec, model, short_train(40), data, dtype=torch.float64)[0]
    net = build_network(model, data.input_shape, 2, data.n_classes, 1, torch.float64)
    np.testing.assert_allclose(plain, _textbook(net, data, 1, "sgd", 0.05, 0.0, 40, 20, 32), rtol=1e-10)


def test_until_converged_stops_at_the_first_evaluation_below_the_threshold(data) -> None:
    spec, model = CellSpec(1, (0,), 0.05), ModelConfig(width=8)
    free = train_plain(spec, model, short_train(200), data, dtype=torch.float64)[0]
    threshold = (free[3] + free[4]) / 2             # invented: met first at the fifth evaluation (the loss falls)
    assert all(a > b for a, b in zip(free, free[1:]))
    stopped = train_plain(spec, model, short_train(200, converge_when=ConvergeConfig(train_loss_below=threshold)),
                          data, dtype=torch.float64, until_converged=True)[0]
    assert stopped == free[:5] and stopped[-1] < threshold < min(stopped[:-1])


def test_probe_plain_records_the_dense_grid_up_to_t_and_the_weights_moved(data) -> None:
    spec, model = CellSpec(2, (0,), 0.05), ModelConfig(width=8)
    train = short_train(100, converge_when=ConvergeConfig(train_loss_below=0.9))
    probes = ProbeConfig(n_points=5)
    (p,) = probe_plain(spec, model, train, probes, data, dtype=torch.float64)
    t = p["iterations"]
    assert p["status"] == "converged" and t < 100 and t % 20 == 0
    assert p["probe_steps"] == [s for s in probe_grids(100, 5)[0] if s < t] + [t]
    # the last displacement is ||W_T - W_0||_F of the network as it ended against a fresh one
    fresh = [m for m in build_mlp(model, data.n_features, 2, data.n_classes, 0, torch.float64)
             if isinstance(m, torch.nn.Linear)]
    ended = [m for m in p["net"] if isinstance(m, torch.nn.Linear)]
    for layer, (a, b) in enumerate(zip(ended, fresh)):
        assert p["displacement"][layer][-1] == pytest.approx(float(torch.linalg.norm(a.weight.detach() - b.weight.detach())), rel=1e-12)
