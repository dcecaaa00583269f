"""The maths of a stack of seed networks: forward, hand-written backward, optimiser, evaluation.

Every seed's weights sit along a leading axis, (n_seeds, fan_in, fan_out), so one
batched matrix product serves all seeds. `train.py` runs the loop with these
pieces; the gradients here equal autograd's on each seed's own network (tests
check it draw by draw).
"""
from __future__ import annotations

from typing import Callable, Iterator

import numpy as np
import torch
import torch.nn.functional as F

from ..config import TrainConfig
from ..information import binned_information
from .probes import gradient_snr_db

#: Largest (n_seeds x rows x width) activation block of one evaluation pass (4 Mi values, 16 MB in float32).
EVAL_BLOCK = 1 << 22
#: Largest block of gathered minibatches held at once, in values (32 MB in float32).
GATHER_BLOCK = 1 << 23


_aten = torch.ops.aten


def tanh_(z: torch.Tensor) -> torch.Tensor:
    """tanh(z) in place, as 2 sigmoid(2z) - 1.

    torch's CPU sigmoid is vectorised more cheaply than its tanh: on this project's 2-core
    AVX2 machine 1.0 against 3.3 ns per float32 value, and the four passes together 1.2 to 1.8 ns
    (benchmarks/RESULTS.md). The identity is exact; the result lies within 2.4e-7 of torch.tanh
    in float32 and 4.5e-16 in float64 (tests/train/test_stacked.py checks both), an absolute error
    of about one rounding step of 1.0, so tanh's derivative taken from it, 1 - h^2, is as good.
    No autograd: the in-place passes overwrite what sigmoid's backward would need.
    """
    return _tanh_of_doubled(z.mul_(2.0))


def _tanh_of_doubled(z2: torch.Tensor) -> torch.Tensor:
    """tanh(z) in place from z2 = 2 z: s = sigmoid(z2), then 2 s - 1 in one pass (2 s is exact, so
    this rounds as s.mul_(2).sub_(1) does). Callers that can produce 2 z for free skip tanh_'s first pass."""
    s = z2.sigmoid_()
    return torch.add(-1.0, s, alpha=2.0, out=s)


def _tanh(z: torch.Tensor) -> torch.Tensor:
    """tanh(z) as `tanh_`, into a new tensor; autograd may run through it (so no out=)."""
    return torch.mul(z, 2.0).sigmoid_().mul_(2.0).sub_(1.0)


def _linear_act(act: str, b: torch.Tensor, h: torch.Tensor, w: torch.Tensor,
                out: torch.Tensor | None = None) -> torch.Tensor:
    """act(b + h w) for stacked (n_seeds, rows, fan_in) h, into `out` when given.

    For tanh the product yields 2 z directly (baddbmm's beta = alpha = 2; doubling is exact, so
    the result is bit for bit `tanh_` of the plain product): two fewer small operations per
    layer and step, which is what a narrow network's step costs.
    """
    if act != "tanh":
        return _activate(act, torch.baddbmm(b, h, w, out=out))
    return _tanh_of_doubled(torch.baddbmm(b, h, w, beta=2.0, alpha=2.0, out=out))


def _activate(name: str, z: torch.Tensor, inplace: bool = True) -> torch.Tensor:
    """The activation of z, in place (unless `inplace` is off, or its derivative needs z itself: gelu).
    Outside autograd only (tanh goes through `tanh_`)."""
    if not inplace:
        return _FRESH[name](z)
    if name == "tanh":
        return tanh_(z)
    if name == "relu":
        return z.relu_()
    if name == "sigmoid":
        return z.sigmoid_()
    return F.gelu(z)


_FRESH = {"tanh": _tanh, "relu": torch.relu, "sigmoid": torch.sigmoid, "gelu": F.gelu}


def _activation_grad(name: str, grad: torch.Tensor, h: torch.Tensor, z: torch.Tensor | None) -> torch.Tensor:
    """grad * act'(z), from the layer's output h (z for gelu), with the kernels autograd itself uses."""
    if name == "tanh":
        return _aten.tanh_backward(grad, h)
    if name == "relu":
        return _aten.threshold_backward(grad, h, 0)
    if name == "sigmoid":
        return _aten.sigmoid_backward(grad, h)
    return _aten.gelu_backward(grad, z)


#: The activations whose derivative `_activation_grad` takes from the output h, with an out= form.
_GRAD_OUT = {"tanh": _aten.tanh_backward.grad_input, "sigmoid": _aten.sigmoid_backward.grad_input,
             "relu": lambda grad, h, grad_input: _aten.threshold_backward.grad_input(grad, h, 0, grad_input=grad_input)}


class _Buffers:
    """Per hidden layer of a stack, for a pass over `rows` rows per seed: its output h (n_seeds, rows,
    width) with h's transposed view, and two gradient tensors of the same shape."""

    def __init__(self, ws: list[torch.Tensor], rows: int) -> None:
        shapes = [(w.shape[0], rows, w.shape[2]) for w in ws[:-1]]
        self.h = [torch.empty(s, dtype=ws[0].dtype) for s in shapes]
        self.ht = [h.transpose(1, 2) for h in self.h]
        self.gw = [torch.empty(s, dtype=ws[0].dtype) for s in shapes]
        self.g = [torch.empty(s, dtype=ws[0].dtype) for s in shapes]

    def transposed(self, layer: int, h: torch.Tensor) -> torch.Tensor:
        """h^T of a layer's input: the stored view when h is this pass's buffer (no op per step)."""
        return self.ht[layer - 1] if layer and h is self.h[layer - 1] else h.transpose(1, 2)


class SeedStack:
    """Every active seed's weights stacked along a leading axis, updated in place.

    ws: per layer (n_seeds, fan_in, fan_out); bs: per layer (n_seeds, 1, fan_out). The transposed
    views wts (and the output layer's bias) stay valid under in-place updates, so they are made
    once here rather than at every step.
    """

    def __init__(self, ws: list[torch.Tensor], bs: list[torch.Tensor], scratch: bool = False) -> None:
        self.ws, self.bs = ws, bs
        self.scratch = scratch
        self._views()

    def _views(self) -> None:
        self.wts = [w.transpose(1, 2) for w in self.ws]
        self.b_out_t = self.bs[-1].transpose(1, 2)
        self._bufs: dict[int, _Buffers] = {}

    def buffers(self, rows: int) -> "_Buffers | None":
        """With `scratch`, the reused activation and gradient tensors of a pass over `rows` rows per seed
        (made once per batch of seeds: a fresh small tensor per layer and step costs its allocation)."""
        if not self.scratch or len(self.ws) < 2:
            return None
        buf = self._bufs.get(rows)
        if buf is None:
            buf = self._bufs[rows] = _Buffers(self.ws, rows)
        return buf

    @property
    def n_seeds(self) -> int:
        return self.ws[0].shape[0]

    def keep(self, rows: torch.Tensor) -> None:
        """Drop finished seeds: keep the given rows."""
        self.ws[:] = [w.index_select(0, rows) for w in self.ws]
        self.bs[:] = [b.index_select(0, rows) for b in self.bs]
        self._views()

    def logits(self, h: torch.Tensor) -> torch.Tensor:
        """The output layer on h (n_seeds, rows, width), laid out class-major (n_seeds, n_classes, rows):
        torch's CPU softmax and reductions are several times slower along a short last axis."""
        return torch.baddbmm(self.b_out_t, self.wts[-1], h.transpose(1, 2))

    def forward(self, x: torch.Tensor, act: str) -> tuple[list[torch.Tensor], list[torch.Tensor | None], torch.Tensor]:
        """Every layer's input (x first), the pre-activations gelu's derivative needs, and the logits.

        Args:
            x: (n_seeds, rows, n_in).
        """
        hs: list[torch.Tensor] = [x]
        zs: list[torch.Tensor | None] = []
        buf = self.buffers(x.shape[1]) if act != "gelu" else None
        for i, (w, b) in enumerate(zip(self.ws[:-1], self.bs[:-1])):
            if act == "gelu":                               # its derivative needs z itself
                zs.append(torch.baddbmm(b, hs[-1], w))
                hs.append(_activate(act, zs[-1]))
                continue
            zs.append(None)                                 # (n_seeds, rows, width), into the layer's own tensor
            hs.append(_linear_act(act, b, hs[-1], w, None if buf is None else buf.h[i]))
        if buf is None:
            return hs, zs, self.logits(hs[-1])
        return hs, zs, torch.baddbmm(self.b_out_t, self.wts[-1], buf.ht[-1])

    def backward(self, hs: list[torch.Tensor], zs: list[torch.Tensor | None], g: torch.Tensor, act: str,
                 update: Callable[[int, torch.Tensor, torch.Tensor], None]) -> None:
        """Walk from the output layer down, handing `update(layer, h, g)` each layer's input h and the
        loss gradient g at its output. The gradient below a layer is taken before `update` changes it."""
        buf = self.buffers(g.shape[1]) if act in _GRAD_OUT else None
        if buf is not None and any(h is not b for h, b in zip(hs[1:], buf.h)):
            buf = None                                      # hs are not this stack's buffers
        for layer in range(len(self.ws) - 1, -1, -1):
            below = None
            if layer and buf is None:
                below = _activation_grad(act, torch.bmm(g, self.wts[layer]), hs[layer], zs[layer - 1])
            elif layer:                                     # the same kernels, into reused tensors
                product = torch.bmm(g, self.wts[layer], out=buf.gw[layer - 1])
                below = _GRAD_OUT[act](product, hs[layer], grad_input=buf.g[layer - 1])
            update(layer, hs[layer], g)
            g = below


def _loss_grad(logits: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """d(cross-entropy summed over rows)/d(logits) = softmax - one-hot target.

    Args:
        logits, target: (n_seeds, n_classes, rows).

    Returns:
        (n_seeds, rows, n_classes), a transposed view.
    """
    return torch.softmax(logits, dim=1).sub_(target).transpose(1, 2)


def _evaluate(stack: SeedStack, x: torch.Tensor, y: torch.Tensor, act: str) -> tuple[np.ndarray, np.ndarray]:
    """Mean cross-entropy and accuracy of every seed on all of (x, y), in row blocks of bounded size."""
    n_seeds, n_rows = stack.n_seeds, x.shape[0]
    width = max(w.shape[2] for w in stack.ws)
    step = max(1, EVAL_BLOCK // max(1, n_seeds * width))
    loss = torch.zeros(n_seeds, dtype=torch.float64)
    hits = torch.zeros(n_seeds, dtype=torch.float64)
    # two activation buffers used in turn: a fresh large tensor per layer costs its page faults each time
    scratch = torch.empty(2, n_seeds * min(step, n_rows) * width, dtype=x.dtype)
    hidden = list(zip(stack.ws[:-1], stack.bs[:-1]))
    if act == "tanh":       # 2z from doubled weights, made once: tanh_'s first pass over the rows, saved
        hidden = [(w * 2.0, b * 2.0) for w, b in hidden]          # (doubling is exact: same bits)
    for lo in range(0, n_rows, step):
        xc, yc = x[lo:lo + step], y[lo:lo + step]
        h = xc.expand(n_seeds, -1, -1)                  # every seed sees the same rows
        for i, (w, b) in enumerate(hidden):
            out = scratch[i % 2, : n_seeds * len(yc) * w.shape[2]].view(n_seeds, len(yc), w.shape[2])
            z = torch.baddbmm(b, h, w, out=out)         # (n_seeds, rows, width)
            h = _tanh_of_doubled(z) if act == "tanh" else _activate(act, z)
        z = stack.logits(h)                             # (n_seeds, n_classes, rows)
        top = z.amax(dim=1, keepdim=True)
        picked = z.gather(1, yc.view(1, 1, -1).expand(n_seeds, 1, -1))
        lse = (z - top).exp_().sum(dim=1, keepdim=True).log_()
        loss += (lse - (picked - top)).sum(dim=(1, 2)).double()
        hits += (picked >= top).sum(dim=(1, 2)).double()
    return (loss / n_rows).numpy(), (hits / n_rows).numpy()


class _Optimizer:
    """torch.optim's SGD (optionally with momentum) and Adam update rules, on a `SeedStack`.

    `update(layer, h, g)` takes a layer's input h (n_seeds, batch, fan_in) and the loss gradient at
    its output g (n_seeds, batch, fan_out), summed over the batch: the mean gradients are
    h^T g / batch and 1^T g / batch. Plain SGD folds that product into the update itself (one
    baddbmm_ per tensor, no gradient buffer); momentum folds it into the velocity.
    """

    def __init__(self, cfg: TrainConfig, lr: float, stack: SeedStack, batch: int) -> None:
        self.kind, self.lr, self.mu = cfg.optimizer, lr, cfg.momentum
        self.stack = stack
        stack.scratch = True              # the training passes reuse their tensors
        self.scale = 1.0 / batch
        self.ones = torch.ones(stack.n_seeds, 1, batch, dtype=stack.ws[0].dtype)
        n_state = 2 if self.kind == "adam" else int(self.mu > 0)
        self.state = [[torch.zeros_like(p) for _ in range(n_state)]        # W_1, b_1, W_2, b_2, ...
                      for w, b in zip(stack.ws, stack.bs) for p in (w, b)]
        self.t = 0
        self.update = self._sgd if n_state == 0 else self._general

    def step(self, x: torch.Tensor, target: torch.Tensor, act: str) -> None:
        """One update of every active seed on its minibatch (x, class-major one-hot target)."""
        hs, zs, logits = self.stack.forward(x, act)
        self.t += 1
        self.stack.backward(hs, zs, _loss_grad(logits, target), act, self.update)

    def _sgd(self, layer: int, h: torch.Tensor, g: torch.Tensor) -> None:
        alpha = -self.lr * self.scale
        buf = self.stack.buffers(h.shape[1])
        ht = h.transpose(1, 2) if buf is None else buf.transposed(layer, h)
        self.stack.ws[layer].baddbmm_(ht, g, alpha=alpha)
        self.stack.bs[layer].baddbmm_(self.ones, g, alpha=alpha)

    def _general(self, layer: int, h: torch.Tensor, g: torch.Tensor) -> None:
        lr, scale = self.lr, self.scale
        for i, (p, left) in enumerate(((self.stack.ws[layer], h.transpose(1, 2)), (self.stack.bs[layer], self.ones))):
            st = self.state[2 * layer + i]
            if self.kind == "adam":
                b1, b2, eps = 0.9, 0.999, 1e-8
                grad = torch.bmm(left, g).mul_(scale)
                st[0].lerp_(grad, 1 - b1)
                st[1].mul_(b2).addcmul_(grad, grad, value=1 - b2)
                denom = (st[1].sqrt() / (1 - b2 ** self.t) ** 0.5).add_(eps)
                p.addcdiv_(st[0], denom, value=-lr / (1 - b1 ** self.t))
            else:
                st[0].baddbmm_(left, g, beta=self.mu, alpha=scale)     # velocity = mu * velocity + grad
                p.add_(st[0], alpha=-lr)

    def keep(self, rows: torch.Tensor) -> None:
        """Drop finished seeds (keep the given rows) from weights and state."""
        self.stack.keep(rows)
        self.ones = self.ones[: len(rows)]
        self.state = [[s.index_select(0, rows) for s in st] for st in self.state]


def draw_gradients(stack: SeedStack, x: torch.Tensor, target: torch.Tensor, act: str,
                    n_draws: int) -> list[torch.Tensor]:
    """Weight gradients of `n_draws` minibatches per seed at the current weights, weights untouched.

    Args:
        x: (n_seeds, n_draws * batch, n_in); target: (n_seeds, n_classes, n_draws * batch);
            each draw's rows consecutive.

    Returns:
        Per layer (n_draws, n_seeds, fan_in, fan_out): one forward and backward pass serves all
        draws, and each draw's gradient is split out at the weight-gradient product.
    """
    n_seeds, batch = x.shape[0], x.shape[1] // n_draws
    grads: list[torch.Tensor] = [torch.empty(0)] * len(stack.ws)

    def collect(layer: int, h: torch.Tensor, g: torch.Tensor) -> None:
        h = h.reshape(n_seeds * n_draws, batch, h.shape[2])
        g = g.reshape(n_seeds * n_draws, batch, g.shape[2])
        gw = torch.bmm(h.transpose(1, 2), g).mul_(1.0 / batch)
        grads[layer] = gw.view(n_seeds, n_draws, *gw.shape[1:]).transpose(0, 1)

    hs, zs, logits = stack.forward(x, act)
    stack.backward(hs, zs, _loss_grad(logits, target), act, collect)
    return grads


def gradient_snr_db_by_layer(stack: SeedStack, x: torch.Tensor, onehot: torch.Tensor, rows: np.ndarray, act: str) -> list[np.ndarray]:
    """Per layer, every seed's gradient SNR in dB over its window of minibatches at the current weights.

    The bias-corrected estimate of `gradient_snr_db`: NaN where the SNR is below what the window
    can resolve.

    Args:
        rows: (n_seeds, n_draws, batch) row indices of each seed's window.

    Seeds go in groups, so that a group's activations (all layers, whole window) and per-draw
    weight gradients together stay within EVAL_BLOCK values.
    """
    n_seeds, n_draws, batch = rows.shape
    per_seed = n_draws * sum((batch + w.shape[1]) * w.shape[2] for w in stack.ws)
    group = max(1, EVAL_BLOCK // per_seed)
    parts = []
    for lo in range(0, n_seeds, group):
        sub = SeedStack([w[lo:lo + group] for w in stack.ws], [b[lo:lo + group] for b in stack.bs])
        drawn = torch.from_numpy(rows[lo:lo + group].reshape(len(sub.ws[0]), -1))   # (group, window * batch)
        grads = draw_gradients(sub, x[drawn], onehot[drawn].transpose(1, 2), act, n_draws)
        parts.append([gradient_snr_db(g.numpy()) for g in grads])
    return [np.concatenate(layer) for layer in zip(*parts)]


def _layer_outputs(stack: SeedStack, x: torch.Tensor, act: str) -> list[torch.Tensor]:
    """Every layer's output on the rows x (n_rows, n_in), for every seed: per hidden layer its
    activations (n_seeds, n_rows, width), and for the output layer the softmax probabilities
    (n_seeds, n_rows, n_classes). Input side first, as the other probes."""
    hs, _, logits = stack.forward(x.expand(stack.n_seeds, -1, -1), act)
    return hs[1:] + [torch.softmax(logits, dim=1).transpose(1, 2)]


def _information(stack: SeedStack, x: torch.Tensor, y: np.ndarray, act: str,
                 n_bins: int) -> list[list[tuple[float, float]]]:
    """Per seed, per layer (I(X;T), I(T;Y)) in bits on the fixed batch (x, y), by binning.

    Seeds go in groups whose activations (all layers, whole batch) stay within EVAL_BLOCK values.
    """
    per_seed = x.shape[0] * sum(w.shape[2] for w in stack.ws)
    group = max(1, EVAL_BLOCK // per_seed)
    out: list[list[tuple[float, float]]] = []
    for lo in range(0, stack.n_seeds, group):
        sub = SeedStack([w[lo:lo + group] for w in stack.ws], [b[lo:lo + group] for b in stack.bs])
        outs = _layer_outputs(sub, x, act)
        out += [[binned_information(o[i].numpy(), y, n_bins) for o in outs] for i in range(sub.n_seeds)]
    return out


def _minibatches(x: torch.Tensor, onehot: torch.Tensor, rows: np.ndarray) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    """Each step's inputs (n_seeds, batch, n_in) and class-major one-hot targets (n_seeds, n_classes, batch).

    Gathers many steps with one index op, laid out so that each step's tensors are contiguous.

    Args:
        x: (n_rows, n_in); onehot: (n_rows, n_classes); rows: (n_seeds, n_steps, batch) row indices.
    """
    n_seeds, n_steps, batch = rows.shape
    per_gather = max(1, GATHER_BLOCK // (n_seeds * batch * (x.shape[1] + onehot.shape[1])))
    for lo in range(0, n_steps, per_gather):
        part = torch.from_numpy(rows[:, lo:lo + per_gather].transpose(1, 0, 2).reshape(-1))
        n = len(part) // (n_seeds * batch)
        xs = x.index_select(0, part).view(n, n_seeds, batch, -1)
        targets = onehot.index_select(0, part).view(n, n_seeds, batch, -1).transpose(2, 3).contiguous()
        for j in range(n):
            yield xs[j], targets[j]
