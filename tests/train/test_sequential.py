"""A user's nn.Sequential run as batched operations on the stacked weights (sequential.py), against
each seed's own module, and the modules it leaves to vmap."""
from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from depthplan.train.functional import stack_networks


def _cnn(seed: int) -> nn.Module:
    torch.manual_seed(seed)
    inner = nn.Sequential(nn.Conv2d(3, 4, 3, stride=2, padding=1, bias=False), nn.GELU(approximate="tanh"))
    return nn.Sequential(nn.Conv2d(2, 3, 3, padding=1), nn.Tanh(), inner, nn.Flatten(), nn.Linear(4 * 3 * 3, 5),
                         nn.Sigmoid(), nn.Linear(5, 3), nn.Identity()).double()


def _mlp(seed: int) -> nn.Module:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(6, 4), nn.ReLU(), nn.Linear(4, 4, bias=False), nn.GELU(), nn.Linear(4, 3)).double()


@pytest.mark.parametrize("build, shape", [(_cnn, (2, 5, 5)), (_mlp, (6,))])
def test_batched_sequential_equals_each_seeds_module(build, shape) -> None:
    # reference: each seed's own nn.Module forward and torch.autograd of its mean cross-entropy, float64
    nets = [build(s) for s in (0, 1, 2)]
    members = stack_networks(nets)
    assert members._direct is not None                      # the vmap-free path
    g = torch.Generator().manual_seed(7)
    x = torch.randn(3, 4, *shape, generator=g, dtype=torch.float64)
    y = torch.randint(0, 3, (3, 4), generator=g)
    logits = members.forward(members.params, x)
    loss = sum(F.cross_entropy(logits[k], y[k]) for k in range(3))
    grads = torch.autograd.grad(loss, members.params)
    for k, net in enumerate(nets):
        torch.testing.assert_close(logits[k], net(x[k]), rtol=1e-12, atol=1e-12)
        want = torch.autograd.grad(F.cross_entropy(net(x[k]), y[k]), list(net.parameters()))
        for got, w in zip(grads, want):
            torch.testing.assert_close(got[k], w, rtol=1e-10, atol=1e-12)


class _Doubled(nn.Linear):
    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return 2 * super().forward(h)


@pytest.mark.parametrize("net", [
    nn.Sequential(nn.Linear(6, 4), nn.LayerNorm(4), nn.Linear(4, 3)),          # a layer it does not know
    nn.Sequential(nn.Linear(6, 4), _Doubled(4, 3)),                            # a subclass with its own forward
    nn.Sequential(nn.Linear(6, 4), nn.BatchNorm1d(4), nn.Linear(4, 3)),        # buffers
])
def test_other_modules_go_through_vmap_and_still_match(net) -> None:
    # reference: the module itself on each seed's rows (vmap path, the same parameters for every seed here)
    net = net.double().eval()                  # batch norm on its running statistics
    members = stack_networks([net, net])
    assert members._direct is None
    x = torch.randn(2, 5, 6, dtype=torch.float64)
    with torch.no_grad():
        torch.testing.assert_close(members.forward(members.params, x)[1], net(x[1]))
