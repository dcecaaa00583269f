"""The torch.func trainer's pieces (functional.py) on their own: stacked optimiser against
torch.optim, stacked modules against each seed's own module. Whole cells against the plain loop:
tests/train/test_families.py."""
from __future__ import annotations

import pytest
import torch

from depthplan.config import ModelConfig, TrainConfig
from depthplan.train.families import build_network
from depthplan.train.functional import StackedOptimizer, build_members, check_model, stack_networks
from trainer_setup import OPTIMIZERS, RATES


@pytest.mark.parametrize("name", OPTIMIZERS)
def test_stacked_optimizer_is_torch_optim_seed_by_seed(name) -> None:
    # reference: torch.optim.SGD / torch.optim.Adam on each seed's slice as a parameter of its own,
    # fed the same (seeded, invented) gradients for six steps
    g = torch.Generator().manual_seed(0)
    cfg, lr = TrainConfig(**OPTIMIZERS[name]), RATES[name]
    stacked = [torch.randn(3, 4, 5, generator=g, dtype=torch.float64), torch.randn(3, 5, generator=g, dtype=torch.float64)]
    per_seed = [[p[k].clone().requires_grad_() for p in stacked] for k in range(3)]
    make = (lambda ps: torch.optim.Adam(ps, lr=lr)) if name == "adam" else \
        (lambda ps: torch.optim.SGD(ps, lr=lr, momentum=cfg.momentum))
    theirs = [make(ps) for ps in per_seed]
    ours = StackedOptimizer(cfg, lr, stacked)
    for _ in range(6):
        grads = tuple(torch.randn(p.shape, generator=g, dtype=torch.float64) for p in stacked)
        ours.step(stacked, grads)
        for k, (ps, opt) in enumerate(zip(per_seed, theirs)):
            for p, grad in zip(ps, grads):
                p.grad = grad[k].clone()
            opt.step()
    for k, ps in enumerate(per_seed):
        for p, q in zip(stacked, ps):
            torch.testing.assert_close(p[k], q.detach(), rtol=1e-12, atol=1e-15)


def test_stacked_modules_compute_what_each_seeds_module_computes() -> None:
    # reference: each seed's own nn.Module called on its own rows and on shared rows
    model = ModelConfig(family="conv", channels=2, activation="relu")
    nets = [build_network(model, (1, 6, 6), 2, 3, seed, torch.float64) for seed in (0, 1, 2)]
    members = stack_networks(nets)
    x = torch.randn(3, 4, 1, 6, 6, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    with torch.no_grad():
        own = members.forward(members.params, x)
        shared = members.shared(x[0])
        for k, net in enumerate(nets):
            torch.testing.assert_close(own[k], net(x[k]), rtol=1e-12, atol=1e-14)
            torch.testing.assert_close(shared[k], net(x[0]), rtol=1e-12, atol=1e-14)
    sub = members.subset([2, 0])
    assert sub.n_seeds == 2 and members.n_seeds == 3                 # the batch itself is untouched
    assert all(torch.equal(a, b[[2, 0]]) for a, b in zip(sub.params, members.params))


@pytest.mark.parametrize("model", [ModelConfig(width=6, family="residual", norm="layer", branch_scale="depth"),
                                   ModelConfig(width=6, family="residual", activation="gelu")])
def test_residual_members_match_the_residual_module(data, model) -> None:
    # the built-in residual family's batched matrix products (no vmap) against ResidualNet.forward
    nets = [build_network(model, data.input_shape, 3, data.n_classes, seed, torch.float64) for seed in (3, 4)]
    members = build_members(model, data, 3, (3, 4), torch.float64)
    x = torch.randn(2, 7, data.n_features, generator=torch.Generator().manual_seed(2), dtype=torch.float64)
    with torch.no_grad():
        out = members.forward(members.params, x)
        for k, net in enumerate(nets):
            torch.testing.assert_close(out[k], net(x[k]), rtol=1e-12, atol=1e-14)


def test_check_model_accepts_a_module_vmap_can_batch(data, tmp_path) -> None:
    # the error lines for factories that cannot be batched: tests/train/test_families.py
    (tmp_path / "nets_ok.py").write_text(
        "from torch import nn\n"
        "def small(depth, n_inputs, n_classes):\n"
        "    return nn.Sequential(*[m for _ in range(depth) for m in (nn.Linear(n_inputs, n_inputs), nn.Tanh())],\n"
        "                         nn.Linear(n_inputs, n_classes))\n")
    assert check_model(ModelConfig(factory="nets_ok:small", factory_path=str(tmp_path)), data, (1, 3)) is None
