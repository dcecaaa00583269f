"""The analytic FLOP count of an update against an independent counter.

Reference: `torch.utils.flop_counter.FlopCounterMode` (PyTorch's own operator-level counter,
which counts the matrix products aten.mm / aten.addmm / aten.bmm as 2 m n k operations) on the
same `nn.Sequential` MLP the reference loop trains, forward and backward of one minibatch. The
fitting code never imports torch; only this test does.
"""
from __future__ import annotations

import pytest
import torch
from torch.utils.flop_counter import FlopCounterMode

from depthplan.config import ModelConfig
from depthplan.fitting.cost import layer_sizes, network_flops, update_flops
from depthplan.train.models import build_mlp


@pytest.mark.parametrize("depth, width, n_in, n_out, batch", [
    (1, 32, 64, 4, 32),        # the demo's shape at K = 1
    (3, 32, 64, 10, 32),       # digits-like: 64 inputs, 10 classes
    (5, (48, 40, 32, 24, 16), 13, 3, 16),   # uneven widths
])
def test_update_flops_equals_torch_flop_counter(depth, width, n_in, n_out, batch):
    cfg = ModelConfig(width=width, activation="tanh")
    net = build_mlp(cfg, n_in, depth, n_out, seed=0)
    x = torch.randn(batch, n_in)                     # the data: no gradient with respect to it
    y = torch.randint(0, n_out, (batch,))
    with FlopCounterMode(display=False) as counter:
        torch.nn.functional.cross_entropy(net(x), y).backward()
    ours = update_flops(layer_sizes(n_in, cfg.widths(depth), n_out), batch)
    assert ours == counter.get_total_flops()
    widths = cfg.widths(depth)
    network = {"n_inputs": n_in, "n_classes": n_out, "batch_size": batch,
               "width": width if isinstance(width, int) else None,
               "widths": None if isinstance(width, int) else list(widths)}
    assert network_flops(network, depth) == ours
