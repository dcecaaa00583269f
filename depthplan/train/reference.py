"""The plain per-seed reference loop: each seed alone, `nn.Sequential` + `torch.optim`.

What the stacked trainer (`loop.train_cell`) must agree with (tests/train) and the baseline
the speed benchmark measures against. Not used by a sweep.
"""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F

from ..config import ModelConfig, ProbeConfig, TrainConfig
from ..records import CellSpec
from .convergence import Criterion, verdict
from .datasets import Dataset
from .batches import BatchStream
from .families import build_network, network_input_shape
from .probes import probe_grids

__all__ = ["train_plain", "probe_plain"]


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
    return [_plain_seed(spec, model, train, data, seed, n_updates or train.max_updates, dtype,
                        until_converged, None)["losses"] for seed in spec.seeds]


def probe_plain(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig, data: Dataset, *,
                dtype: torch.dtype = torch.float32) -> list[dict]:
    """Reference probes: each seed alone until it stops, its displacement ||W_t - W_0||_F per layer
    at the dense probe grid up to its end and at the end itself (what `train_cell` records).

    Returns:
        Per seed {"iterations", "status", "probe_steps", "displacement" (per layer), "net" (the
        network as it ended)}.
    """
    grid = set(probe_grids(train.max_updates, probes.n_points)[0])
    return [_plain_seed(spec, model, train, data, seed, train.max_updates, dtype, True, grid)
            for seed in spec.seeds]


def _plain_seed(spec: CellSpec, model: ModelConfig, train: TrainConfig, data: Dataset, seed: int,
                n_updates: int, dtype: torch.dtype, until_converged: bool, probe_at: set[int] | None) -> dict:
    """One seed's plain loop: losses every `eval_every` updates, and displacements at `probe_at`."""
    x = torch.from_numpy(data.x_train).to(dtype)
    y = torch.from_numpy(data.y_train)
    x_val = torch.from_numpy(data.x_val).to(dtype)
    y_val = torch.from_numpy(data.y_val)
    criterion = Criterion.from_config(train.converge_when)
    shape = network_input_shape(model, data.input_shape)     # rows as the network takes them
    x, x_val = x.view(len(x), *shape), x_val.view(len(x_val), *shape)
    net = build_network(model, data.input_shape, spec.depth, data.n_classes, seed, dtype)
    linears = [m for m in net.modules() if isinstance(m, (torch.nn.Linear, torch.nn.Conv2d))]
    w0 = [lin.weight.detach().clone() for lin in linears]
    if train.optimizer == "adam":
        opt: torch.optim.Optimizer = torch.optim.Adam(net.parameters(), lr=spec.learning_rate)
    else:
        opt = torch.optim.SGD(net.parameters(), lr=spec.learning_rate, momentum=train.momentum)
    stream = BatchStream(seed, x.shape[0], train.batch_size)
    losses: list[float] = []
    steps: list[int] = []
    disp: list[list[float]] = []
    status, step = "censored", 0
    for step in range(1, n_updates + 1):
        rows = torch.from_numpy(stream.take(1)[0])
        opt.zero_grad(set_to_none=True)
        F.cross_entropy(net(x[rows]), y[rows]).backward()
        opt.step()
        ended = None
        if step % train.eval_every == 0:
            with torch.no_grad():
                logits = net(x)
                losses.append(float(F.cross_entropy(logits, y)))
                if until_converged:
                    acc = float((logits.argmax(dim=1) == y).double().mean())
                    val = math.nan
                    if criterion.needs_validation and len(y_val):
                        val = float((net(x_val).argmax(dim=1) == y_val).double().mean())
                    ended = verdict(criterion, step, n_updates, losses[-1], acc, val)
        if probe_at is not None and (step in probe_at or ended in ("converged", "censored")):
            steps.append(step)
            disp.append([float(torch.linalg.norm(lin.weight.detach() - w)) for lin, w in zip(linears, w0)])
        if ended is not None:
            status = ended
            break
    return {"losses": losses, "iterations": step, "status": status, "probe_steps": steps,
            "displacement": [[d[i] for d in disp] for i in range(len(linears))], "net": net}
