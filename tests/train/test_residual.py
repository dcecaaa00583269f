"""The residual family's hand-written backward (residual.py) against autograd on each seed's own module."""
from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F

from depthplan.config import DataConfig, ModelConfig
from depthplan.train.datasets import load_dataset
from depthplan.train.families import build_network
from depthplan.train.functional import build_members


@pytest.fixture(scope="module")
def tab():
    return load_dataset(DataConfig(source="synthetic", n_samples=120, n_features=6, n_classes=4))


@pytest.mark.parametrize("activation", ["tanh", "relu", "gelu", "sigmoid"])
@pytest.mark.parametrize("branch_scale", [None, "depth"])
def test_hand_written_gradients_equal_autograd_on_each_seeds_module(tab, activation, branch_scale) -> None:
    # reference: torch.autograd on each seed's own ResidualNet (families.build_network, the module the
    # plain loop trains) of its mean cross-entropy on its own rows, float64
    model = ModelConfig(width=5, family="residual", activation=activation, branch_scale=branch_scale)
    seeds, depth, rows = (0, 1, 2), 3, 7
    members = build_members(model, tab, depth, seeds, torch.float64)
    assert members.grad is not None                       # no norm: the hand-written path
    x = torch.from_numpy(tab.x_train[: len(seeds) * rows]).double().view(len(seeds), rows, -1)
    y = torch.from_numpy(tab.y_train[: len(seeds) * rows]).view(len(seeds), rows)
    grads = members.grad(members.params, x, y)
    for k, seed in enumerate(seeds):
        net = build_network(model, tab.input_shape, depth, tab.n_classes, seed, torch.float64)
        names = [n for n, _ in net.named_parameters()]
        assert names == members.names
        want = torch.autograd.grad(F.cross_entropy(net(x[k]), y[k]), list(net.parameters()))
        for name, g, w in zip(names, grads, want):
            torch.testing.assert_close(g[k], w, rtol=1e-10, atol=1e-12, msg=f"{activation} {name}")
        with torch.no_grad():                                 # the forward pass the evaluation uses
            torch.testing.assert_close(members.forward(members.params, x)[k], net(x[k]), rtol=1e-12, atol=1e-12)


def test_layer_norm_keeps_autograd(tab) -> None:
    members = build_members(ModelConfig(width=5, family="residual", norm="layer"), tab, 2, (0,), torch.float64)
    assert members.grad is None
