"""Turn a `ModelConfig` and a depth into MLP weights, or into an `nn.Sequential`.

Weights are drawn from a seed alone, so seed s gets the same first layers at
every depth (common random numbers make the depth comparison less noisy), and
the batched trainer and a plain PyTorch loop start from identical weights.
"""
from __future__ import annotations

import math

import torch
from torch import nn

from ..config import ModelConfig
from ..errors import ConfigError

#: Gain of each activation for He-style init (torch.nn.init.calculate_gain; gelu takes relu's).
ACTIVATION_GAIN = {"tanh": 5.0 / 3.0, "relu": math.sqrt(2.0), "gelu": math.sqrt(2.0), "sigmoid": 1.0}


def layer_sizes(n_in: int, widths: tuple[int, ...], n_out: int) -> list[tuple[int, int]]:
    """(fan_in, fan_out) of every linear layer, input side first."""
    dims = [n_in, *widths, n_out]
    return list(zip(dims[:-1], dims[1:]))


def init_gain(cfg: ModelConfig) -> float:
    """The gain the config asks for, or the init's own default."""
    if cfg.init_gain is not None:
        return cfg.init_gain
    return ACTIVATION_GAIN[cfg.activation] if cfg.init in ("he", "kaiming") else 1.0


def init_weights(cfg: ModelConfig, n_in: int, widths: tuple[int, ...], n_out: int,
                 seed: int, dtype: torch.dtype = torch.float32) -> list[tuple[torch.Tensor, torch.Tensor]]:
    """Draw (weight (out, in), bias (out,)) for every layer of one seed's network."""
    g = torch.Generator().manual_seed(int(seed))
    out = []
    for fan_in, fan_out in layer_sizes(n_in, widths, n_out):
        w, b = draw_layer(cfg, (fan_out, fan_in), fan_in, fan_out, g)
        out.append((w.to(dtype), b.to(dtype)))
    return out


def draw_layer(cfg: ModelConfig, shape: tuple[int, ...], fan_in: int, fan_out: int,
               g: torch.Generator) -> tuple[torch.Tensor, torch.Tensor]:
    """One layer's float64 (weight of `shape`, bias (shape[0],)) by the config's init, from generator g.

    fan_in and fan_out as PyTorch counts them (a convolution's include its kernel's size).
    """
    gain = init_gain(cfg)
    w = torch.empty(*shape, dtype=torch.float64)
    b = torch.zeros(shape[0], dtype=torch.float64)
    if cfg.init == "default":  # what nn.Linear and nn.Conv2d do: U(-1/sqrt(fan_in), 1/sqrt(fan_in))
        bound = 1.0 / math.sqrt(fan_in)
        w.uniform_(-bound, bound, generator=g)
        b.uniform_(-bound, bound, generator=g)
    elif cfg.init in ("he", "kaiming"):
        w.normal_(0.0, gain / math.sqrt(fan_in), generator=g)
    elif cfg.init in ("xavier", "glorot"):
        w.normal_(0.0, gain * math.sqrt(2.0 / (fan_in + fan_out)), generator=g)
    elif cfg.init == "orthogonal":
        nn.init.orthogonal_(w, gain=gain, generator=g)
    else:  # config.py admits only the names above
        raise ConfigError(f"model.init: unknown init {cfg.init!r}")
    return w, b


def activation_module(name: str) -> nn.Module:
    return {"tanh": nn.Tanh, "relu": nn.ReLU, "gelu": nn.GELU, "sigmoid": nn.Sigmoid}[name]()


def build_mlp(cfg: ModelConfig, n_in: int, depth: int, n_out: int, seed: int,
              dtype: torch.dtype = torch.float32) -> nn.Sequential:
    """A plain `nn.Sequential` MLP with `depth` hidden layers and the seed's weights."""
    widths = cfg.widths(depth)
    layers: list[nn.Module] = []
    for (fan_in, fan_out), (w, b) in zip(layer_sizes(n_in, widths, n_out),
                                         init_weights(cfg, n_in, widths, n_out, seed, dtype)):
        lin = nn.Linear(fan_in, fan_out, dtype=dtype)
        with torch.no_grad():
            lin.weight.copy_(w)
            lin.bias.copy_(b)
        layers += [lin, activation_module(cfg.activation)]
    return nn.Sequential(*layers[:-1])


def count_params(n_in: int, widths: tuple[int, ...], n_out: int) -> int:
    return sum(i * o + o for i, o in layer_sizes(n_in, widths, n_out))
