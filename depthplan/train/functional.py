"""Train one cell of a residual, conv or user-built network: every seed's `nn.Module` stacked and batched.

The mlp family has its own hand-written batched trainer (`loop.py`, `stacked.py`). Here the seeds'
modules (`families.build_network`, one per seed, initialised from the seed) are stacked with
`torch.func.stack_module_state` and run as one batch with `torch.func.functional_call` under
`torch.vmap` (PyTorch's model-ensembling recipe): no hand-written maths, so any module that vmap
can batch works. The loss is the sum over seeds of each seed's mean cross-entropy, so one autograd
pass gives every seed its own gradient. The optimiser applies torch.optim's SGD, momentum and Adam
rules to the stacked tensors (one `torch._foreach_*` call per operation). Each seed keeps its own
minibatch order (`batches.BatchStream`), so its trajectory equals a plain per-seed `torch.optim` loop (`reference.train_plain`; tests/train).

Three cases skip vmap (same maths, measured faster: benchmarks/family_speed.py): the built-in
residual family runs as batched matrix products on the stacked weights, without norm with a
hand-written backward (`residual.py`), with `norm: layer` through autograd; the built-in conv
family and a factory module that is an `nn.Sequential` of common layers run as batched products
and grouped convolutions (`sequential.py`) through autograd. Every other module goes through vmap.

Probes: per weight tensor (every parameter with two or more axes, in the module's order: input
side first for the built-in families), the displacement ||W_t - W_0||_F, the gradient SNR over a
window of fresh minibatches and (`probes.information`) the binned I(X;T), I(T;Y) of what the layer
hands on, with the same estimators (`probes.py`, `information.py`) and the same schedule
(`cell.py`) as the mlp family. The loop itself is `cell.run_cell`, shared with `loop.py`.
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
from ..information import binned_information
from .batches import BatchStream, cell_tensors
from .cell import ProbeValues, ProgressFn, Schedule, cell_results, layer_displacements, run_cell
from .convergence import Criterion
from .datasets import Dataset
from .families import branch_multiplier, build_network, network_input_shape
from .probes import gradient_snr_db
from .residual import ResidualMaths
from .sequential import conv, grouped, linear, seed_major, sequential_forward

#: Largest (n_seeds x rows x activations per row) block of one evaluation pass, in values.
EVAL_BLOCK = 1 << 22
#: Largest block of gathered minibatches held at once, in values.
GATHER_BLOCK = 1 << 23

Forward = Callable[[list[torch.Tensor], torch.Tensor], torch.Tensor]
Gradients = Callable[[list[torch.Tensor], torch.Tensor, torch.Tensor], list[torch.Tensor]]
_ACT = {"tanh": torch.tanh, "relu": F.relu, "gelu": F.gelu, "sigmoid": torch.sigmoid}


class Members:
    """Every active seed's parameters stacked along a leading axis, and the batched forward pass.

    params: per parameter tensor (n_seeds, *shape), leaves that require grad, in the module's
    order; `forward(params, x)` maps x (n_seeds, rows, *input) to logits (n_seeds, rows, n_classes).
    """

    def __init__(self, params: list[torch.Tensor], names: list[str], buffers: list[torch.Tensor],
                 buffer_names: list[str], base: nn.Module, call: Callable[..., torch.Tensor] | None = None,
                 direct: Forward | None = None, grad: Gradients | None = None) -> None:
        self.params, self.names, self.buffers, self.buffer_names = params, names, buffers, buffer_names
        self.base = base                     # the module on the meta device, for `functional_call`
        self._direct = direct
        self.grad = grad                     # a hand-written backward, if the family has one
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

    def subset(self, rows: list[int]) -> Members:
        """The seeds at the given rows as a batch of their own (copies; this batch is untouched)."""
        sub = copy.copy(self)
        sub.params, sub.buffers = list(self.params), list(self.buffers)
        sub.keep(torch.tensor(rows, dtype=torch.long))
        return sub

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
    direct = sequential_forward(base, names, len(bnames))
    if direct is not None:         # an nn.Sequential of common layers: batched operations, no vmap
        return Members([params[n] for n in names], names, [], [], base, direct=direct)

    def call(p: list[torch.Tensor], b: list[torch.Tensor], x: torch.Tensor) -> torch.Tensor:
        return functional_call(base, ({**dict(zip(names, p)), **dict(zip(bnames, b))}), (x,))

    return Members([params[n] for n in names], names, [buffers[n] for n in bnames], bnames, base, call=call)


def _residual_members(nets: list[nn.Module], model: ModelConfig, depth: int) -> Members:
    """The built-in residual family as batched matrix products on its stacked weights (no vmap)."""
    params, buffers = stack_module_state(nets)
    names, bnames = list(params), list(buffers)
    at = {n: i for i, n in enumerate(names)}
    act, a, norm = _ACT[model.activation], branch_multiplier(model, depth), model.norm == "layer"
    if not norm:                   # the hand-written backward (residual.py), no autograd
        maths = ResidualMaths(depth, model.activation, a)
        return Members([params[n] for n in names], names, [buffers[n] for n in bnames], bnames,
                       copy.deepcopy(nets[0]).to("meta"), direct=maths.logits, grad=maths.gradients)

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

    return Members([params[n] for n in names], names, [buffers[n] for n in bnames], bnames,
                   copy.deepcopy(nets[0]).to("meta"), direct=forward)


def _conv_members(nets: list[nn.Module], model: ModelConfig, depth: int) -> Members:
    """The built-in conv family as grouped convolutions on its stacked weights (`sequential.conv`, no vmap)."""
    params, buffers = stack_module_state(nets)
    names, bnames = list(params), list(buffers)
    act = _ACT[model.activation]

    def forward(p: list[torch.Tensor], x: torch.Tensor) -> torch.Tensor:
        n_seeds, h = x.shape[0], grouped(x)                               # (rows, n_seeds * c_in, H, W)
        for k in range(depth):
            h = act(conv(h, p[2 * k], p[2 * k + 1], n_seeds, padding=1))
        pooled = seed_major(h.mean(dim=(-2, -1), keepdim=True), n_seeds).flatten(2)   # (n_seeds, rows, channels)
        return linear(pooled, p[-2], p[-1])

    return Members([params[n] for n in names], names, [buffers[n] for n in bnames], bnames,
                   copy.deepcopy(nets[0]).to("meta"), direct=forward)


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
    if model.family_name == "conv":
        return _conv_members(nets, model, depth)
    return stack_networks(nets)


def _loss(logits: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """Sum over seeds of each seed's mean cross-entropy. logits (n_seeds, rows, n_classes), y (n_seeds, rows)."""
    return F.cross_entropy(logits.transpose(1, 2), y, reduction="none").mean(dim=1).sum()


def _gradients(members: Members, x: torch.Tensor, y: torch.Tensor) -> tuple[torch.Tensor, ...]:
    """Every seed's gradient of its mean minibatch loss, per stacked tensor."""
    if members.grad is not None:
        with torch.no_grad():
            return tuple(members.grad(members.params, x, y))
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
        """One update of every stacked tensor, each rule as one `torch._foreach_*` call per operation."""
        self.t += 1
        lr, grads = self.lr, list(grads)
        if self.kind == "adam":
            b1, b2, eps = 0.9, 0.999, 1e-8
            m, v = [st[0] for st in self.state], [st[1] for st in self.state]
            torch._foreach_lerp_(m, grads, 1 - b1)
            torch._foreach_mul_(v, b2)
            torch._foreach_addcmul_(v, grads, grads, value=1 - b2)
            denom = torch._foreach_sqrt(v)
            torch._foreach_div_(denom, (1 - b2 ** self.t) ** 0.5)
            torch._foreach_add_(denom, eps)
            torch._foreach_addcdiv_(params, m, denom, value=-lr / (1 - b1 ** self.t))
        elif self.mu > 0:
            velocity = [st[0] for st in self.state]
            torch._foreach_mul_(velocity, self.mu)   # velocity = mu * velocity + grad (torch's first step: grad)
            torch._foreach_add_(velocity, grads)
            torch._foreach_add_(params, velocity, alpha=-lr)
        else:
            torch._foreach_add_(params, grads, alpha=-lr)

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


class _MembersEngine:
    """Stacked `nn.Module` seeds (`Members`) as the `cell.Engine` that `cell.run_cell` drives."""

    def __init__(self, members: Members, opt: StackedOptimizer, x: torch.Tensor, y: torch.Tensor,
                 x_eval: torch.Tensor, y_eval: torch.Tensor, x_val: torch.Tensor, y_val: torch.Tensor,
                 x_info: torch.Tensor, y_info: np.ndarray, per_row: int, probes: ProbeConfig) -> None:
        self.members, self.opt, self.x, self.y, self.probes = members, opt, x, y, probes
        self.eval_set, self.val_set, self.info_set = (x_eval, y_eval), (x_val, y_val), (x_info, y_info)
        self.per_row = per_row
        self.weights = _probe_tensors(members)
        self.w0 = [members.params[i].detach().clone() for i in self.weights]

    def minibatches(self, rows: np.ndarray):
        return _minibatches(self.x, self.y, rows)

    def step(self, batch: tuple[torch.Tensor, torch.Tensor]) -> None:
        self.opt.step(self.members.params, _gradients(self.members, *batch))

    def evaluate(self, validation: bool) -> tuple[np.ndarray, np.ndarray]:
        return _evaluate(self.members, *(self.val_set if validation else self.eval_set), self.per_row)

    def validation(self, done: list[int], val_acc: np.ndarray) -> list[float]:
        if np.isnan(val_acc).all():                  # not measured this block: the criterion does not need it
            val_acc = _evaluate(self.members, *self.val_set, self.per_row)[1]
        return [float(val_acc[k]) for k in done]

    def probe(self, rows: list[int], draws: np.ndarray | None, sparse: bool) -> ProbeValues:
        """Per weight tensor the displacement of the seeds at stack `rows`, with `draws` their gradient
        SNR, and with `sparse` and `probes.information` their information."""
        sub = self.members if len(rows) == self.members.n_seeds else self.members.subset(rows)
        pick = torch.tensor(rows, dtype=torch.long)
        disp = layer_displacements([sub.params[i] for i in self.weights], [w.index_select(0, pick) for w in self.w0])
        snr = None
        if draws is not None:
            grads = []
            for j in range(draws.shape[1]):
                idx = torch.from_numpy(draws[:, j].reshape(-1))
                g = _gradients(sub, self.x.index_select(0, idx).view(len(rows), -1, *self.x.shape[1:]),
                               self.y.index_select(0, idx).view(len(rows), -1))
                grads.append([g[i].numpy() for i in self.weights])
            snr = [gradient_snr_db(np.stack([d[k] for d in grads])) for k in range(len(self.weights))]
        info = _information(sub, self.weights, *self.info_set, self.probes.bins) \
            if sparse and self.probes.information else None
        return disp, snr, info

    def keep(self, rows: torch.Tensor) -> None:
        self.members.keep(rows)
        self.opt.keep(rows)
        self.w0 = [w.index_select(0, rows) for w in self.w0]


def _information(members: Members, weights: list[int], x: torch.Tensor, y: np.ndarray,
                 n_bins: int) -> list[list[tuple[float, float]]]:
    """Per seed, per weight tensor (I(X;T), I(T;Y)) in bits on the fixed batch (x, y), by binning.

    A layer's representation T is what it hands on: the input of the next weight tensor's module
    (for an mlp, the hidden layer's activations, as the mlp trainer takes them), and for the last
    one the softmax of the logits. Each seed runs alone through the module with forward pre-hooks,
    as hooks cannot hand tensors out of vmap. A representation the forward pass never reaches
    (a module not called) is NaN.
    """
    modules = dict(members.base.named_modules())
    owners = [modules[members.names[i].rpartition(".")[0]] for i in weights]
    out: list[list[tuple[float, float]]] = []
    for k in range(members.n_seeds):
        seen: dict[int, torch.Tensor] = {}
        hooks = [m.register_forward_pre_hook(lambda _m, args, j=j: seen.setdefault(j, args[0]))
                 for j, m in enumerate(owners[1:])]
        state = {**{n: p[k].detach() for n, p in zip(members.names, members.params)},
                 **{n: b[k] for n, b in zip(members.buffer_names, members.buffers)}}
        try:
            with torch.no_grad():
                logits = functional_call(members.base, state, (x,))
        finally:
            for h in hooks:
                h.remove()
        outs = [seen.get(j) for j in range(len(owners) - 1)] + [torch.softmax(logits, dim=1)]
        out.append([(math.nan, math.nan) if o is None else binned_information(o.reshape(len(o), -1).numpy(), y, n_bins)
                    for o in outs])
    return out


def train_cell_functional(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig,
                          data: Dataset, progress: ProgressFn | None, dtype: torch.dtype,
                          eval_rows: int | None) -> list[RunResult]:
    """`loop.train_cell` for every family but mlp: same arguments, stopping rules, probe schedule and records."""
    t_start = time.perf_counter()
    t = cell_tensors(data, dtype, eval_rows)
    shape = network_input_shape(model, data.input_shape)
    x, x_eval, x_val, x_info = (v.view(len(v), *shape) for v in (t.x, t.x_eval, t.x_val, t.x_info))
    budget = min(train.max_updates, spec.stop_after or train.max_updates)
    members = build_members(model, data, spec.depth, spec.seeds, dtype)
    first = [p[0] for p in members.params]
    # activations of one row of one seed, at most: the widest layer times the image's pixels
    per_row = max(math.prod(shape), max(p.shape[0] for p in first) * (math.prod(shape[1:]) if len(shape) == 3 else 1))
    streams = [BatchStream(s, x.shape[0], train.batch_size) for s in spec.seeds]
    engine = _MembersEngine(members, StackedOptimizer(train, spec.learning_rate, members.params),
                            x, torch.from_numpy(data.y_train), x_eval, t.y_eval, x_val, t.y_val, x_info, t.y_info,
                            per_row, probes)
    log = run_cell(engine, Schedule.build(probes, budget, spec.seeds, x.shape[0]), streams,
                   Criterion.from_config(train.converge_when), budget, train.eval_every, len(t.y_val) > 0, progress)
    own = model.family_name != "factory"
    return cell_results(
        spec, train, probes, log, time.perf_counter() - t_start, len(engine.weights),
        width=model.conv_channels if model.family_name == "conv" else int(first[0].shape[0]),
        n_params=sum(p.numel() for p in first),
        activation=model.activation if own else "", init=model.init if own else "",
        family=model.family_name, model_options=model.options_text())
