"""Train one cell of a residual, conv or user-built network: every seed's `nn.Module` stacked and batched.

The mlp family has its own hand-written batched trainer (`loop.py`, `stacked.py`). Here the seeds'
modules (`families.build_network`, one per seed, initialised from the seed) are stacked with
`torch.func.stack_module_state` and run as one batch with `torch.func.functional_call` under
`torch.vmap` (PyTorch's model-ensembling recipe): no hand-written maths, so any module that vmap
can batch works. The loss is the sum over seeds of each seed's mean cross-entropy, so one autograd
pass gives every seed its own gradient. The optimiser applies torch.optim's SGD, momentum and Adam
rules to each stacked tensor. Each seed keeps its own minibatch order (`loop.BatchStream`), so its
trajectory equals a plain per-seed `torch.optim` loop (`reference.train_plain`; tests/train).

The built-in residual family skips vmap: its forward pass is a few batched matrix products on the
stacked weights (same maths, measured faster: benchmarks/family_speed.py).

Probes: per weight tensor (every parameter with two or more axes, in the module's order: input
side first for the built-in families), the displacement ||W_t - W_0||_F and the gradient SNR over
a window of fresh minibatches, with the same estimators (`probes.py`) as the mlp family.
"""
from __future__ import annotations

import copy
import math
import time
from typing import Callable

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.func import functional_call, stack_module_state, vmap

from ..config import ModelConfig, ProbeConfig, TrainConfig
from ..errors import ConfigError, first_line
from ..records import CellSpec, RunResult
from .batches import BatchStream, _cell_tensors
from .convergence import Criterion, verdict
from .datasets import Dataset
from .families import branch_multiplier, build_network, network_input_shape
from .probes import displacement, gradient_snr_db, log_spaced_steps

#: Largest (n_seeds x rows x activations per row) block of one evaluation pass, in values.
EVAL_BLOCK = 1 << 22
#: Largest block of gathered minibatches held at once, in values.
GATHER_BLOCK = 1 << 23

Forward = Callable[[list[torch.Tensor], torch.Tensor], torch.Tensor]
_ACT = {"tanh": torch.tanh, "relu": F.relu, "gelu": F.gelu, "sigmoid": torch.sigmoid}


class Members:
    """Every active seed's parameters stacked along a leading axis, and the batched forward pass.

    params: per parameter tensor (n_seeds, *shape), leaves that require grad, in the module's
    order; `forward(params, x)` maps x (n_seeds, rows, *input) to logits (n_seeds, rows, n_classes).
    """

    def __init__(self, params: list[torch.Tensor], names: list[str], buffers: list[torch.Tensor],
                 call: Callable[..., torch.Tensor] | None = None, direct: Forward | None = None) -> None:
        self.params, self.names, self.buffers = params, names, buffers
        self._direct = direct
        if call is not None:
            self._batched = vmap(call, in_dims=(0, 0, 0))
            self._shared = vmap(call, in_dims=(0, 0, None))

    @property
    def n_seeds(self) -> int:
        return self.params[0].shape[0]

    def forward(self, params: list[torch.Tensor], x: torch.Tensor) -> torch.Tensor:
        if self._direct is not None:
            return self._direct(params, x)
        return self._batched(params, self.buffers, x)

    def shared(self, x: torch.Tensor) -> torch.Tensor:
        """Logits of every seed on the same rows x (rows, *input)."""
        if self._direct is not None:
            return self._direct(self.params, x.expand(self.n_seeds, *x.shape))
        return self._shared(self.params, self.buffers, x)

    def keep(self, rows: torch.Tensor) -> None:
        """Drop finished seeds: keep the given rows."""
        with torch.no_grad():
            self.params[:] = [p.detach().index_select(0, rows).requires_grad_() for p in self.params]
            self.buffers[:] = [b.index_select(0, rows) for b in self.buffers]


def stack_networks(nets: list[nn.Module]) -> Members:
    """The seeds' modules as one vmapped batch (`torch.func.stack_module_state` + `functional_call`)."""
    params, buffers = stack_module_state(nets)
    base = copy.deepcopy(nets[0]).to("meta")
    names, bnames = list(params), list(buffers)

    def call(p: list[torch.Tensor], b: list[torch.Tensor], x: torch.Tensor) -> torch.Tensor:
        return functional_call(base, ({**dict(zip(names, p)), **dict(zip(bnames, b))}), (x,))

    return Members([params[n] for n in names], names, [buffers[n] for n in bnames], call=call)


def _residual_members(nets: list[nn.Module], model: ModelConfig, depth: int) -> Members:
    """The built-in residual family as batched matrix products on its stacked weights (no vmap)."""
    params, _ = stack_module_state(nets)
    names = list(params)
    at = {n: i for i, n in enumerate(names)}
    act, a, norm = _ACT[model.activation], branch_multiplier(model, depth), model.norm == "layer"

    def lin(p: list[torch.Tensor], h: torch.Tensor, key: str) -> torch.Tensor:
        # h (n_seeds, rows, fan_in) -> (n_seeds, rows, fan_out), as nn.Linear: h W^T + b
        return torch.baddbmm(p[at[key + ".bias"]].unsqueeze(1), h, p[at[key + ".weight"]].transpose(1, 2))

    def forward(p: list[torch.Tensor], x: torch.Tensor) -> torch.Tensor:
        h = lin(p, x, "input")
        for k in range(depth):
            z = h
            if norm:
                z = F.layer_norm(z, z.shape[-1:]) * p[at[f"blocks.{k}.norm.weight"]].unsqueeze(1) \
                    + p[at[f"blocks.{k}.norm.bias"]].unsqueeze(1)
            h = h + a * lin(p, act(z), f"blocks.{k}.linear")
        return lin(p, h, "readout")

    return Members([params[n] for n in names], names, [], direct=forward)


def check_model(cfg: ModelConfig, data: Dataset, depths: tuple[int, ...]) -> None:
    """Build the network at the shallowest and deepest depth and run two seeds of it batched, or raise.

    What `depthplan check` and `depthplan run` do before any training, so that a factory that
    fails to import, returns something else, gives the wrong output shape or cannot be batched
    over seeds is one line naming `model.factory`.

    Raises:
        ConfigError, DataError: naming the key and what was found.
    """
    data_shape, n_classes = data.input_shape, data.n_classes
    for depth in sorted({min(depths), max(depths)}):
        nets = [build_network(cfg, data_shape, depth, n_classes, seed, torch.float32) for seed in (0, 1)]
        shape = network_input_shape(cfg, data_shape)
        x = torch.zeros(2, *shape)
        try:
            out = nets[0](x)
        except Exception as exc:
            raise ConfigError(f"model.{_key(cfg)}: the depth-{depth} network fails on a batch of shape "
                              f"{tuple(x.shape)}: {type(exc).__name__}: {first_line(str(exc))}") from None
        if not isinstance(out, torch.Tensor) or tuple(out.shape) != (2, n_classes):
            got = tuple(out.shape) if isinstance(out, torch.Tensor) else f"a {type(out).__name__}"
            raise ConfigError(f"model.{_key(cfg)}: the depth-{depth} network maps a batch of shape {tuple(x.shape)} "
                              f"to {got}, expected (2, {n_classes}) (one logit per class)")
        members = stack_networks(nets)
        try:
            logits = members.forward(members.params, x.expand(2, *x.shape))
            torch.autograd.grad(logits.sum(), members.params)
        except Exception as exc:
            raise ConfigError(f"model.{_key(cfg)}: the depth-{depth} network cannot be batched over seeds with "
                              f"torch.func.vmap ({type(exc).__name__}: {first_line(str(exc))}); a module that draws "
                              "random numbers (dropout) or reads tensors back as Python numbers (.item()) "
                              "cannot") from None


def _key(cfg: ModelConfig) -> str:
    return "factory" if cfg.factory else "family"


def build_members(model: ModelConfig, data: Dataset, depth: int, seeds: tuple[int, ...],
                  dtype: torch.dtype) -> Members:
    """Every seed's network (initialised from its seed) stacked for batched training."""
    nets = [build_network(model, data.input_shape, depth, data.n_classes, s, dtype) for s in seeds]
    if model.family_name == "residual":
        return _residual_members(nets, model, depth)
    return stack_networks(nets)


def _loss(logits: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """Sum over seeds of each seed's mean cross-entropy. logits (n_seeds, rows, n_classes), y (n_seeds, rows)."""
    return F.cross_entropy(logits.transpose(1, 2), y, reduction="none").mean(dim=1).sum()


def _gradients(members: Members, x: torch.Tensor, y: torch.Tensor) -> tuple[torch.Tensor, ...]:
    """Every seed's gradient of its mean minibatch loss, per stacked tensor."""
    with torch.enable_grad():
        return torch.autograd.grad(_loss(members.forward(members.params, x), y), members.params)


class StackedOptimizer:
    """torch.optim's SGD (optionally with momentum) and Adam update rules on stacked tensors."""

    def __init__(self, cfg: TrainConfig, lr: float, params: list[torch.Tensor]) -> None:
        self.kind, self.lr, self.mu = cfg.optimizer, lr, cfg.momentum
        n_state = 2 if self.kind == "adam" else int(self.mu > 0)
        self.state = [[torch.zeros_like(p, requires_grad=False) for _ in range(n_state)] for p in params]
        self.t = 0

    @torch.no_grad()
    def step(self, params: list[torch.Tensor], grads: tuple[torch.Tensor, ...]) -> None:
        self.t += 1
        lr = self.lr
        for p, g, st in zip(params, grads, self.state):
            if self.kind == "adam":
                b1, b2, eps = 0.9, 0.999, 1e-8
                st[0].lerp_(g, 1 - b1)
                st[1].mul_(b2).addcmul_(g, g, value=1 - b2)
                denom = (st[1].sqrt() / (1 - b2 ** self.t) ** 0.5).add_(eps)
                p.addcdiv_(st[0], denom, value=-lr / (1 - b1 ** self.t))
            elif st:
                st[0].mul_(self.mu).add_(g)      # velocity = mu * velocity + grad (torch's first step: grad)
                p.add_(st[0], alpha=-lr)
            else:
                p.add_(g, alpha=-lr)

    def keep(self, rows: torch.Tensor) -> None:
        self.state = [[s.index_select(0, rows) for s in st] for st in self.state]


def _evaluate(members: Members, x: torch.Tensor, y: torch.Tensor, per_row: int) -> tuple[np.ndarray, np.ndarray]:
    """Mean cross-entropy and accuracy of every seed on all of (x, y), in row blocks of bounded size.

    A row counts as right when its label's logit is the largest (ties count), as in the mlp trainer.
    """
    n_seeds, n_rows = members.n_seeds, x.shape[0]
    step = max(1, EVAL_BLOCK // max(1, n_seeds * per_row))
    loss = torch.zeros(n_seeds, dtype=torch.float64)
    hits = torch.zeros(n_seeds, dtype=torch.float64)
    with torch.no_grad():
        for lo in range(0, n_rows, step):
            yc = y[lo:lo + step]
            z = members.shared(x[lo:lo + step])                     # (n_seeds, rows, n_classes)
            top = z.amax(dim=2, keepdim=True)
            picked = z.gather(2, yc.view(1, -1, 1).expand(n_seeds, -1, 1))
            lse = (z - top).exp().sum(dim=2, keepdim=True).log()
            loss += (lse - (picked - top)).sum(dim=(1, 2)).double()
            hits += (picked >= top).sum(dim=(1, 2)).double()
    return (loss / n_rows).numpy(), (hits / n_rows).numpy()


def _minibatches(x: torch.Tensor, y: torch.Tensor, rows: np.ndarray):
    """Each step's inputs (n_seeds, batch, *input) and labels (n_seeds, batch), gathered in blocks."""
    n_seeds, n_steps, batch = rows.shape
    per_row = math.prod(x.shape[1:])
    per_gather = max(1, GATHER_BLOCK // (n_seeds * batch * per_row))
    for lo in range(0, n_steps, per_gather):
        part = torch.from_numpy(np.ascontiguousarray(rows[:, lo:lo + per_gather].transpose(1, 0, 2)).reshape(-1))
        n = len(part) // (n_seeds * batch)
        xs = x.index_select(0, part).view(n, n_seeds, batch, *x.shape[1:])
        ys = y.index_select(0, part).view(n, n_seeds, batch)
        for j in range(n):
            yield xs[j], ys[j]


def _probe_tensors(members: Members) -> list[int]:
    """Positions of the weight tensors (two or more axes per seed): the probes' layers."""
    return [i for i, p in enumerate(members.params) if p.ndim >= 3]


def train_cell_functional(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig,
                          data: Dataset, progress: Callable[[int], None] | None, dtype: torch.dtype,
                          eval_rows: int | None) -> list[RunResult]:
    """`loop.train_cell` for every family but mlp: same arguments, same stopping rules, same records."""
    t_start = time.perf_counter()
    t = _cell_tensors(data, dtype, eval_rows)
    shape = network_input_shape(model, data.input_shape)
    x, x_eval, x_val = (v.view(len(v), *shape) for v in (t.x, t.x_eval, t.x_val))
    y = torch.from_numpy(data.y_train)
    criterion = Criterion.from_config(train.converge_when)
    budget = min(train.max_updates, spec.stop_after or train.max_updates)
    seeds = spec.seeds
    members = build_members(model, data, spec.depth, seeds, dtype)
    first = [p[0] for p in members.params]
    # activations of one row of one seed, at most: the widest layer times the image's pixels
    per_row = max(math.prod(shape), max(p.shape[0] for p in first) * (math.prod(shape[1:]) if len(shape) == 3 else 1))
    weights = _probe_tensors(members)
    w0 = [members.params[i].detach().clone() for i in weights]
    streams = [BatchStream(s, x.shape[0], train.batch_size) for s in seeds]
    opt = StackedOptimizer(train, spec.learning_rate, members.params)
    probe_rngs = [np.random.default_rng([int(s), 0x5A1]) for s in seeds]
    probe_at = set(log_spaced_steps(budget, probes.n_points)) if (probes.displacement or probes.snr) else set()

    active = list(range(len(seeds)))
    curves: list[list[tuple[int, float]]] = [[] for _ in seeds]
    probe_log: list[list[tuple[int, list[float], list[float]]]] = [[] for _ in seeds]
    seat_time = np.zeros(len(seeds))
    ended: dict[int, dict] = {}
    step = 0

    def probe() -> None:
        disp = [displacement(members.params[i].detach().numpy(), w.numpy()) for i, w in zip(weights, w0)]
        snr = [np.full(len(active), math.nan)] * len(weights)
        if probes.snr:
            rows = np.stack([probe_rngs[a].integers(0, x.shape[0], (probes.snr_window, streams[a].batch))
                             for a in active])                              # (n_active, window, batch)
            draws = []
            for j in range(probes.snr_window):
                idx = torch.from_numpy(rows[:, j].reshape(-1))
                g = _gradients(members, x.index_select(0, idx).view(len(active), -1, *shape),
                               y.index_select(0, idx).view(len(active), -1))
                draws.append([g[i].numpy() for i in weights])
            snr = [gradient_snr_db(np.stack([d[k] for d in draws])) for k in range(len(weights))]
        for k, a in enumerate(active):
            probe_log[a].append((step, [float(d[k]) for d in disp], [float(s[k]) for s in snr]))

    while active:
        t_block = time.perf_counter()
        n = min(train.eval_every - step % train.eval_every, budget - step)
        rows = np.stack([streams[a].take(n) for a in active])               # (n_active, n, batch)
        for xb, yb in _minibatches(x, y, rows):
            if step in probe_at:
                probe()
            opt.step(members.params, _gradients(members, xb, yb))
            step += 1
        if step in probe_at and step == budget:
            probe()
        loss, acc = _evaluate(members, x_eval, t.y_eval, per_row)
        val_acc = np.full(len(active), math.nan)
        if criterion.needs_validation and len(t.y_val):
            val_acc = _evaluate(members, x_val, t.y_val, per_row)[1]
        done, keep = [], []
        for k, a in enumerate(active):
            curves[a].append((step, float(loss[k])))
            v = verdict(criterion, step, budget, float(loss[k]), float(acc[k]), float(val_acc[k]))
            (keep if v is None else done).append(k)
            if v is not None:
                ended[a] = {"status": v, "iterations": step, "loss": float(loss[k]), "acc": float(acc[k])}
        seat_time[active] += (time.perf_counter() - t_block) / len(active)
        if done and len(t.y_val):
            val = val_acc if criterion.needs_validation else _evaluate(members, x_val, t.y_val, per_row)[1]
            for k in done:
                ended[active[k]]["val"] = float(val[k])
        if done:
            rows_kept = torch.tensor(keep, dtype=torch.long)       # finished seeds leave the batch
            members.keep(rows_kept)
            opt.keep(rows_kept)
            w0 = [w.index_select(0, rows_kept) for w in w0]
        if progress is not None:
            progress(n * len(active) + len(done) * (budget - step))
        active = [active[k] for k in keep]

    elapsed = time.perf_counter() - t_start
    setup = (elapsed - seat_time.sum()) / len(seeds)
    n_params = sum(p.numel() for p in first)
    width = model.conv_channels if model.family_name == "conv" else int(first[0].shape[0])
    return [_result(spec, model, train, probes, seed, ended[a], float(seat_time[a] + setup), curves[a],
                    probe_log[a], n_params, width, len(weights))
            for a, seed in enumerate(seeds)]


def _result(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig, seed: int, end: dict,
            wall: float, curve: list[tuple[int, float]], plog: list[tuple[int, list[float], list[float]]],
            n_params: int, width: int, n_layers: int) -> RunResult:
    """One seed's `RunResult` from what its cell recorded."""
    own = model.family_name != "factory"
    return RunResult(
        depth=spec.depth, width=width, seed=seed, learning_rate=spec.learning_rate,
        status=end["status"], iterations=end["iterations"], wall_seconds=wall,
        seconds_per_update=wall / max(1, end["iterations"]),
        final_train_loss=end["loss"], final_train_accuracy=end["acc"],
        validation_accuracy=end.get("val", math.nan), n_params=n_params,
        activation=model.activation if own else "", init=model.init if own else "", optimizer=train.optimizer,
        lr_mode=spec.lr_mode, cell_id=spec.cell_id, family=model.family_name, model_options=model.options_text(),
        eval_steps=tuple(s for s, _ in curve), train_loss=tuple(v for _, v in curve),
        probe_steps=tuple(p[0] for p in plog),
        displacement=tuple(tuple(p[1][i] for p in plog) for i in range(n_layers)) if probes.displacement and plog else (),
        snr_db=tuple(tuple(p[2][i] for p in plog) for i in range(n_layers)) if probes.snr and plog else (),
    )
