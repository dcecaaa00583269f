"""Build one seed's network of any family as a plain `nn.Module`: mlp, residual, conv, or the user's own.

- residual: input projection to `width`, K one-layer pre-activation blocks
  h <- h + a * Linear(act(norm(h))), a linear readout of h. a = 1, or 1/sqrt(K) with
  `branch_scale: depth` (the depth-scaled parameterisation of Yang, Yu, Zhu and Hayou 2023,
  "Tensor Programs VI", arXiv:2310.02244, and Bordelon, Noci, Li, Hanin and Pehlevan 2023,
  "Depthwise hyperparameter transfer in residual networks", arXiv:2309.16620).
- conv: K blocks of 3x3 convolution (same padding) -> act on (C, H, W) inputs, global average
  pooling, a linear readout.
- factory: `model.factory: "package.module:function"`, called as
  `function(depth=K, n_inputs=..., n_classes=..., **model.options)` after `torch.manual_seed(seed)`
  (so `torch.initial_seed()` inside the factory is the seed) with torch's default dtype set to the
  trainer's (float32, or float64 in the tests), returning an `nn.Module`.

Built-in families draw their weights from the seed alone with the same rules as the MLP
(`models.draw_layer`), so seed s shares its first layers at every depth. These modules are what
the batched trainer (`functional.py`) stacks, and what the plain per-seed reference loop trains.
"""
from __future__ import annotations

import importlib
import math
import sys
from typing import Any

import torch
from torch import nn

from ..config import ModelConfig
from ..errors import ConfigError, DataError, first_line
from .models import activation_module, build_mlp, draw_layer, init_weights

__all__ = ["ResidualNet", "ConvNet", "build_network", "network_input_shape", "branch_multiplier"]


def branch_multiplier(cfg: ModelConfig, depth: int) -> float:
    """a of h <- h + a * f(h): 1, or 1/sqrt(K) under `branch_scale: depth`."""
    return 1.0 / math.sqrt(depth) if cfg.branch_scale == "depth" else 1.0


class ResidualBlock(nn.Module):
    """f(h) = Linear(act(norm(h))): one layer per block."""

    def __init__(self, width: int, activation: str, norm: str | None) -> None:
        super().__init__()
        self.norm = nn.LayerNorm(width) if norm == "layer" else nn.Identity()
        self.act = activation_module(activation)
        self.linear = nn.Linear(width, width)

    def forward(self, h: torch.Tensor) -> torch.Tensor:
        return self.linear(self.act(self.norm(h)))


class ResidualNet(nn.Module):
    """x -> input projection -> K blocks h <- h + a * f(h) -> readout."""

    def __init__(self, n_in: int, width: int, depth: int, n_out: int, activation: str,
                 norm: str | None, branch: float) -> None:
        super().__init__()
        self.input = nn.Linear(n_in, width)
        self.blocks = nn.ModuleList(ResidualBlock(width, activation, norm) for _ in range(depth))
        self.readout = nn.Linear(width, n_out)
        self.branch = branch

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.input(x)
        for block in self.blocks:
            h = h + self.branch * block(h)
        return self.readout(h)


class ConvNet(nn.Module):
    """(C, H, W) -> K blocks of 3x3 conv (same padding) -> act -> global average pool -> readout."""

    def __init__(self, c_in: int, channels: int, depth: int, n_out: int, activation: str) -> None:
        super().__init__()
        self.blocks = nn.Sequential(*(nn.Sequential(nn.Conv2d(c_in if i == 0 else channels, channels, 3, padding=1),
                                                    activation_module(activation)) for i in range(depth)))
        self.readout = nn.Linear(channels, n_out)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.readout(self.blocks(x).mean(dim=(-2, -1)))


def network_input_shape(cfg: ModelConfig, data_shape: tuple[int, ...]) -> tuple[int, ...]:
    """The shape of one row as the network receives it: images for conv and factories, else flat."""
    if cfg.family_name in ("conv", "factory"):
        return data_shape
    return (math.prod(data_shape),)


def _copy_in(layer: nn.Module, w: torch.Tensor, b: torch.Tensor) -> None:
    with torch.no_grad():
        layer.weight.copy_(w)
        layer.bias.copy_(b)


def build_network(cfg: ModelConfig, data_shape: tuple[int, ...], depth: int, n_classes: int, seed: int,
                  dtype: torch.dtype = torch.float32) -> nn.Module:
    """One seed's network of the config's family with `depth` hidden blocks.

    Args:
        data_shape: one data row's shape, (n_features,) or (C, H, W) (`Dataset.input_shape`).

    Raises:
        ConfigError: the factory cannot be imported or called, or does not return an `nn.Module`.
        DataError: conv on rows that are not images.
    """
    name = cfg.family_name
    n_flat = math.prod(data_shape)
    if name == "mlp":
        return build_mlp(cfg, n_flat, depth, n_classes, seed, dtype)
    if name == "factory":
        return _call_factory(cfg, data_shape, depth, n_classes, seed, dtype)
    if name == "residual":
        width = int(cfg.width if isinstance(cfg.width, int) else cfg.width[0])
        net = ResidualNet(n_flat, width, depth, n_classes, cfg.activation, cfg.norm, branch_multiplier(cfg, depth))
        drawn = init_weights(cfg, n_flat, (width,) * (depth + 1), n_classes, seed)
        layers = [net.input, *(blk.linear for blk in net.blocks), net.readout]
        for layer, (w, b) in zip(layers, drawn):
            _copy_in(layer, w, b)
        return net.to(dtype)
    if len(data_shape) != 3:
        raise DataError(f"model.family conv needs image rows (C, H, W); the data's rows have shape {data_shape} "
                        "(use data.source digits_images, or an npz/npy array of shape (N, C, H, W))")
    channels = cfg.conv_channels
    net = ConvNet(data_shape[0], channels, depth, n_classes, cfg.activation)
    g = torch.Generator().manual_seed(int(seed))
    for block in net.blocks:
        conv = block[0]
        c_out, c_in = conv.weight.shape[:2]
        _copy_in(conv, *draw_layer(cfg, tuple(conv.weight.shape), c_in * 9, c_out * 9, g))
    _copy_in(net.readout, *draw_layer(cfg, (n_classes, channels), channels, n_classes, g))
    return net.to(dtype)


# --------------------------------------------------------------------------- the user's module

def _n_inputs(data_shape: tuple[int, ...]) -> int | tuple[int, ...]:
    """What a factory receives as n_inputs: the feature count, or (C, H, W) for images."""
    return data_shape[0] if len(data_shape) == 1 else tuple(data_shape)


def _load_factory(cfg: ModelConfig) -> Any:
    """The factory function, imported from `model.factory_path` first, then the environment."""
    module_name, _, fn_name = str(cfg.factory).partition(":")
    added = cfg.factory_path is not None and cfg.factory_path not in sys.path
    if added:
        sys.path.insert(0, str(cfg.factory_path))
    try:
        module = importlib.import_module(module_name)
    except Exception as exc:   # ImportError, SyntaxError, or whatever the module's own code raised
        raise ConfigError(f"model.factory: cannot import {module_name} from {cfg.factory_path} or the environment "
                          f"({type(exc).__name__}: {first_line(str(exc))})") from None
    finally:
        if added:
            sys.path.remove(str(cfg.factory_path))
    fn = getattr(module, fn_name, None)
    if not callable(fn):
        found = "nothing" if fn is None else f"a {type(fn).__name__}"
        raise ConfigError(f"model.factory: {module_name} has no function {fn_name} (found {found})")
    return fn


def _call_factory(cfg: ModelConfig, data_shape: tuple[int, ...], depth: int, n_classes: int, seed: int,
                  dtype: torch.dtype) -> nn.Module:
    fn = _load_factory(cfg)
    kwargs = {"depth": depth, "n_inputs": _n_inputs(data_shape), "n_classes": n_classes, **(cfg.options or {})}
    call = f"{cfg.factory}({', '.join(f'{k}={v!r}' for k, v in kwargs.items())})"
    before = torch.get_default_dtype()
    # the caller's global RNG state is left as it was; modules are built in the trainer's dtype
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(int(seed))
        torch.set_default_dtype(dtype)
        try:
            net = fn(**kwargs)
        except Exception as exc:
            raise ConfigError(f"model.factory: {call} raised {type(exc).__name__}: {first_line(str(exc))}") from None
        finally:
            torch.set_default_dtype(before)
    if not isinstance(net, nn.Module):
        raise ConfigError(f"model.factory: {call} returned a {type(net).__name__}, expected a torch.nn.Module")
    if not any(p.requires_grad for p in net.parameters()):
        raise ConfigError(f"model.factory: {call} returned a module with no trainable parameters")
    return net.to(dtype)
