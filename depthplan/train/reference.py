"""The plain per-seed reference loop: each seed alone, `nn.Sequential` + `torch.optim`.

What the stacked trainer (`loop.train_cell`) must agree with (tests/train) and the baseline
the speed benchmark measures against. Not used by a sweep.
"""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F

from ..config import ModelConfig, TrainConfig
from ..records import CellSpec
from .convergence import Criterion, verdict
from .datasets import Dataset
from .loop import BatchStream
from .families import build_network, network_input_shape

__all__ = ["train_plain"]


def train_plain(spec: CellSpec, model: ModelConfig, train: TrainConfig, data: Dataset, *,
                n_updates: int | None = None, dtype: torch.dtype = torch.float32,
                until_converged: bool = False) -> list[list[float]]:
    """Reference: each seed alone, its `nn.Module` (any family) + `torch.optim`, same init and batch order.

    Runs `n_updates` (default `train.max_updates`) updates and returns each seed's
    full-training-set loss after every `train.eval_every` updates. Used to check the
    batched trainer and as the benchmark's baseline.

    Args:
        until_converged: stop a seed at the first evaluation where `train.converge_when`
            holds or its loss is not finite, as `train_cell` does; its list ends there.
    """
    x = torch.from_numpy(data.x_train).to(dtype)
    y = torch.from_numpy(data.y_train)
    x_val = torch.from_numpy(data.x_val).to(dtype)
    y_val = torch.from_numpy(data.y_val)
    criterion = Criterion.from_config(train.converge_when)
    n_updates = n_updates or train.max_updates
    shape = network_input_shape(model, data.input_shape)     # rows as the network takes them
    x, x_val = x.view(len(x), *shape), x_val.view(len(x_val), *shape)
    out = []
    for seed in spec.seeds:
        net = build_network(model, data.input_shape, spec.depth, data.n_classes, seed, dtype)
        if train.optimizer == "adam":
            opt: torch.optim.Optimizer = torch.optim.Adam(net.parameters(), lr=spec.learning_rate)
        else:
            opt = torch.optim.SGD(net.parameters(), lr=spec.learning_rate, momentum=train.momentum)
        stream = BatchStream(seed, x.shape[0], train.batch_size)
        losses = []
        for step in range(1, n_updates + 1):
            rows = torch.from_numpy(stream.take(1)[0])
            opt.zero_grad(set_to_none=True)
            F.cross_entropy(net(x[rows]), y[rows]).backward()
            opt.step()
            if step % train.eval_every == 0:
                with torch.no_grad():
                    logits = net(x)
                    losses.append(float(F.cross_entropy(logits, y)))
                    if until_converged:
                        acc = float((logits.argmax(dim=1) == y).double().mean())
                        val = math.nan
                        if criterion.needs_validation and len(y_val):
                            val = float((net(x_val).argmax(dim=1) == y_val).double().mean())
                        if verdict(criterion, step, n_updates, losses[-1], acc, val) is not None:
                            break
        out.append(losses)
    return out
