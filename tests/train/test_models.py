"""Per-seed initial weights and the plain nn.Sequential MLP (models.py), against torch.nn.init's
documented gains and distributions, nn.Linear's parameter count and its default init."""
from __future__ import annotations

import math

import pytest
import torch

from depthplan.config import ModelConfig
from depthplan.train.models import (activation_module, build_mlp, count_params, draw_layer, init_gain,
                                    init_weights, layer_sizes)


@pytest.mark.parametrize("activation", ["tanh", "relu", "sigmoid"])
def test_he_gain_is_torchs_calculate_gain(activation) -> None:
    # reference: torch.nn.init.calculate_gain (5/3 for tanh, sqrt(2) for relu, 1 for sigmoid)
    assert init_gain(ModelConfig(activation=activation)) == pytest.approx(torch.nn.init.calculate_gain(activation))
    assert init_gain(ModelConfig(activation=activation, init="xavier")) == 1.0
    assert init_gain(ModelConfig(activation=activation, init_gain=0.7)) == 0.7


@pytest.mark.parametrize("init, expected", [
    ("he", 5 / 3 / math.sqrt(300)),              # He et al. 2015, eq. 10, with tanh's gain 5/3
    ("xavier", math.sqrt(2 / (300 + 200))),      # Glorot and Bengio 2010, gain 1 (torch's xavier_normal_)
])
def test_normal_inits_have_the_published_standard_deviation(init, expected) -> None:
    # 200 x 300 = 60,000 draws: the sample standard deviation is within 1 % (its relative standard
    # error is 1 / sqrt(2 n) = 0.3 %); the mean within 4 standard errors of zero; biases zero
    cfg = ModelConfig(activation="tanh", init=init)
    w, b = draw_layer(cfg, (200, 300), 300, 200, torch.Generator().manual_seed(1))
    assert float(w.std()) == pytest.approx(expected, rel=0.01)
    assert abs(float(w.mean())) < 4 * expected / math.sqrt(w.numel())
    assert torch.count_nonzero(b) == 0 and w.dtype == torch.float64


def test_default_init_is_nn_linears_uniform_bound() -> None:
    # reference: nn.Linear.reset_parameters, U(-1/sqrt(fan_in), 1/sqrt(fan_in)) for weight and bias
    w, b = draw_layer(ModelConfig(init="default"), (50, 400), 400, 50, torch.Generator().manual_seed(2))
    bound = 1 / math.sqrt(400)
    assert float(w.abs().max()) <= bound and float(w.abs().max()) > 0.99 * bound
    assert float(w.var()) == pytest.approx(bound ** 2 / 3, rel=0.03)       # variance of U(-a, a): a^2 / 3
    assert float(b.abs().max()) <= bound and torch.count_nonzero(b) == 50


def test_orthogonal_init_has_orthonormal_rows_times_the_gain() -> None:
    # reference: torch.nn.init.orthogonal_ (W W^T = gain^2 I for a wide matrix); gain 1 unless set
    for gain, cfg in ((1.0, ModelConfig(activation="relu", init="orthogonal")),
                      (1.5, ModelConfig(activation="relu", init="orthogonal", init_gain=1.5))):
        w, _ = draw_layer(cfg, (6, 10), 10, 6, torch.Generator().manual_seed(3))
        torch.testing.assert_close(w @ w.T, gain ** 2 * torch.eye(6, dtype=torch.float64), rtol=0, atol=1e-12)


def test_a_seed_gets_the_same_first_layers_at_every_depth() -> None:
    # common random numbers (models.py): one generator per seed, drawn input side first
    cfg = ModelConfig(width=8)
    shallow = init_weights(cfg, 5, cfg.widths(1), 3, seed=4)
    deep = init_weights(cfg, 5, cfg.widths(4), 3, seed=4)
    assert torch.equal(shallow[0][0], deep[0][0]) and torch.equal(shallow[0][1], deep[0][1])
    assert not torch.equal(init_weights(cfg, 5, cfg.widths(1), 3, seed=5)[0][0], shallow[0][0])


def test_build_mlp_holds_the_seeds_weights_and_nn_linears_parameter_count() -> None:
    cfg = ModelConfig(width=(7, 6, 5), activation="gelu")
    net = build_mlp(cfg, 4, 3, 2, seed=9, dtype=torch.float64)
    linears = [m for m in net if isinstance(m, torch.nn.Linear)]
    assert [(lin.in_features, lin.out_features) for lin in linears] == layer_sizes(4, (7, 6, 5), 2) \
        == [(4, 7), (7, 6), (6, 5), (5, 2)]
    assert [type(m) for m in net][1::2] == [torch.nn.GELU] * 3 and isinstance(net[-1], torch.nn.Linear)
    for lin, (w, b) in zip(linears, init_weights(cfg, 4, (7, 6, 5), 2, seed=9, dtype=torch.float64)):
        assert torch.equal(lin.weight, w) and torch.equal(lin.bias, b)
    # reference: the parameters torch counts in the module
    assert count_params(4, (7, 6, 5), 2) == sum(p.numel() for p in net.parameters()) == 4 * 7 + 7 + 7 * 6 + 6 + 6 * 5 + 5 + 5 * 2 + 2
    assert isinstance(activation_module("sigmoid"), torch.nn.Sigmoid)
