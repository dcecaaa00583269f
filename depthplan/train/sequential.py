"""A stack of seed networks run as batched operations on their stacked weights, without vmap.

Two layouts carry the seeds: seed-major (n_seeds, rows, *features) for linear layers, and
grouped (rows, n_seeds * channels, H, W) for convolutions, where one `F.conv2d` with
groups = n_seeds convolves every seed with its own kernels (the call vmap's batching rule makes
too, without its per-call wrapping). Element-wise activations take either layout.

`sequential_forward` covers a user's module that is an `nn.Sequential` (nested ones too) of
`nn.Linear`, `nn.Conv2d` (groups 1, zero padding), `nn.Flatten` and the common activations, of
those exact classes (a subclass may change `forward`); anything else returns None and the
trainer uses vmap. Backward by autograd. Measured faster than vmap on the benchmark's networks
(benchmarks/family_speed.py); the trainer's results equal a plain per-seed torch.optim loop's
(tests/train/test_families.py, test_sequential.py).
"""
from __future__ import annotations

from typing import Callable

import torch
import torch.nn.functional as F
from torch import nn

Forward = Callable[[list[torch.Tensor], torch.Tensor], torch.Tensor]

_ACTIVATIONS: dict[type, Callable[[torch.Tensor], torch.Tensor]] = {
    nn.Tanh: torch.tanh, nn.ReLU: torch.relu, nn.Sigmoid: torch.sigmoid, nn.Identity: lambda h: h}


def grouped(h: torch.Tensor) -> torch.Tensor:
    """Seed-major (n_seeds, rows, C, H, W) to grouped (rows, n_seeds * C, H, W)."""
    return h.transpose(0, 1).reshape(h.shape[1], -1, *h.shape[3:])


def seed_major(h: torch.Tensor, n_seeds: int) -> torch.Tensor:
    """Grouped (rows, n_seeds * C, H, W) to seed-major (n_seeds, rows, C, H, W) (a view)."""
    return h.view(h.shape[0], n_seeds, -1, *h.shape[2:]).transpose(0, 1)


def conv(h: torch.Tensor, w: torch.Tensor, b: torch.Tensor | None, n_seeds: int, **options) -> torch.Tensor:
    """Every seed's convolution on grouped h: w (n_seeds, c_out, c_in, kh, kw), b (n_seeds, c_out)."""
    return F.conv2d(h, w.reshape(-1, *w.shape[2:]), None if b is None else b.reshape(-1), groups=n_seeds, **options)


def linear(h: torch.Tensor, w: torch.Tensor, b: torch.Tensor | None) -> torch.Tensor:
    """Every seed's h W^T + b on seed-major h (n_seeds, rows, ..., fan_in): w (n_seeds, fan_out, fan_in)."""
    flat = h.reshape(h.shape[0], -1, h.shape[-1])
    out = torch.bmm(flat, w.transpose(1, 2)) if b is None else torch.baddbmm(b.unsqueeze(1), flat, w.transpose(1, 2))
    return out.view(*h.shape[:-1], w.shape[1])


def _leaves(module: nn.Module, prefix: str) -> list[tuple[str, nn.Module]] | None:
    """The layers of a (nested) `nn.Sequential` in call order with their names, or None."""
    if type(module) is not nn.Sequential:
        return [(prefix, module)]
    out: list[tuple[str, nn.Module]] = []
    for name, child in module.named_children():
        inner = _leaves(child, f"{prefix}{name}.")
        if inner is None:
            return None
        out += inner
    return out


Step = Callable[[list[torch.Tensor], torch.Tensor, bool, int], tuple[torch.Tensor, bool]]


def sequential_forward(base: nn.Module, names: list[str], n_buffers: int) -> Forward | None:
    """The batched forward pass of `base` on the stacked parameters (in `names` order), or None when
    `base` is not an `nn.Sequential` of the layers this module knows."""
    if type(base) is not nn.Sequential or n_buffers:
        return None
    at = {n: i for i, n in enumerate(names)}
    steps: list[Step] = []
    for prefix, m in _leaves(base, "") or []:
        kind = type(m)
        own = [n for n in names if n.startswith(prefix) and "." not in n[len(prefix):]]
        if kind is nn.Linear and len(own) == 1 + (m.bias is not None):
            steps.append(_linear_step(at[prefix + "weight"], at.get(prefix + "bias")))
        elif kind is nn.Conv2d and m.groups == 1 and m.padding_mode == "zeros" and isinstance(m.padding, tuple) \
                and len(own) == 1 + (m.bias is not None):
            steps.append(_conv_step(at[prefix + "weight"], at.get(prefix + "bias"),
                                    dict(stride=m.stride, padding=m.padding, dilation=m.dilation)))
        elif not own and (kind in _ACTIVATIONS or kind is nn.GELU):
            fn = (lambda h, a=m.approximate: F.gelu(h, approximate=a)) if kind is nn.GELU else _ACTIVATIONS[kind]
            steps.append(lambda p, h, is_grouped, n_seeds, fn=fn: (fn(h), is_grouped))
        elif not own and kind is nn.Flatten and m.start_dim == 1 and m.end_dim == -1:
            steps.append(_flatten_step)
        else:
            return None
    if len(list(base.parameters())) != len(names) or not steps:
        return None

    def forward(p: list[torch.Tensor], x: torch.Tensor) -> torch.Tensor:
        h, is_grouped, n_seeds = x, False, x.shape[0]
        for step in steps:
            h, is_grouped = step(p, h, is_grouped, n_seeds)
        return seed_major(h, n_seeds) if is_grouped else h

    return forward


# Each step takes and returns the tensor and whether it is grouped (a convolution's output).

def _linear_step(i_w: int, i_b: int | None) -> Step:
    def step(p: list[torch.Tensor], h: torch.Tensor, is_grouped: bool, n_seeds: int) -> tuple[torch.Tensor, bool]:
        h = seed_major(h, n_seeds) if is_grouped else h
        return linear(h, p[i_w], None if i_b is None else p[i_b]), False
    return step


def _conv_step(i_w: int, i_b: int | None, options: dict) -> Step:
    def step(p: list[torch.Tensor], h: torch.Tensor, is_grouped: bool, n_seeds: int) -> tuple[torch.Tensor, bool]:
        h = h if is_grouped else grouped(h)
        return conv(h, p[i_w], None if i_b is None else p[i_b], n_seeds, **options), True
    return step


def _flatten_step(p: list[torch.Tensor], h: torch.Tensor, is_grouped: bool, n_seeds: int) -> tuple[torch.Tensor, bool]:
    h = seed_major(h, n_seeds) if is_grouped else h
    return h.reshape(h.shape[0], h.shape[1], -1), False
