"""Residual, conv and user-built networks: the torch.func batched trainer against a plain per-seed
torch.optim loop, the factory path against the built-in mlp trainer, and the factory's error lines."""
from __future__ import annotations

import textwrap
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import torch

from depthplan.config import ConvergeConfig, DataConfig, ModelConfig, ProbeConfig, TrainConfig
from depthplan.errors import ConfigError
from depthplan.records import CellSpec
from depthplan.train.batches import INFORMATION_ROWS
from depthplan.train.datasets import load_dataset
from depthplan.train.families import ConvNet, ResidualNet, build_network
from depthplan.train.functional import check_model
from depthplan.train.loop import train_cell
from depthplan.information import binned_information
from depthplan.train.reference import probe_plain, train_plain

NO_PROBES = ProbeConfig(displacement=False, snr=False)
NEVER = ConvergeConfig(train_loss_below=1e-12)
OPTIMIZERS = {"sgd": dict(optimizer="sgd"), "momentum": dict(optimizer="sgd", momentum=0.9),
              "adam": dict(optimizer="adam")}
RATES = {"sgd": 0.05, "momentum": 0.01, "adam": 0.005}

# a factory module a user could write: the built-in mlp's own init, seeded by the trainer
FACTORY = '''
import torch
from torch import nn
from depthplan.config import ModelConfig
from depthplan.train.models import build_mlp

def mlp(depth, n_inputs, n_classes, width=8, activation="tanh"):
    return build_mlp(ModelConfig(width=width, activation=activation), n_inputs, depth, n_classes,
                     torch.initial_seed(), torch.get_default_dtype())

def small_cnn(depth, n_inputs, n_classes, channels=3):
    c, h, w = n_inputs
    layers = []
    for i in range(depth):
        layers += [nn.Conv2d(c if i == 0 else channels, channels, 3, padding=1), nn.ReLU()]
    return nn.Sequential(*layers, nn.Flatten(), nn.Linear(channels * h * w, n_classes))

def not_a_module(depth, n_inputs, n_classes):
    return [depth]

def wrong_shape(depth, n_inputs, n_classes):
    return nn.Linear(n_inputs, n_classes + 1)

def raises(depth, n_inputs, n_classes):
    raise RuntimeError("no GPU here")

def with_dropout(depth, n_inputs, n_classes):
    return nn.Sequential(nn.Linear(n_inputs, 8), nn.Dropout(0.5), nn.Linear(8, n_classes))

NOT_CALLABLE = 3
'''


pytestmark = pytest.mark.usefixtures("one_thread")     # tests/train/conftest.py


@pytest.fixture(scope="module")
def tab():
    return load_dataset(DataConfig(source="synthetic", n_samples=240, n_features=10, n_classes=3))


@pytest.fixture(scope="module")
def img():
    # scikit-learn's digits as 1x8x8 images, 120 training rows kept for speed
    d = load_dataset(DataConfig(source="digits_images"))
    return replace(d, x_train=d.x_train[:120], y_train=d.y_train[:120])


@pytest.fixture(scope="module")
def factory_dir(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("factories")
    (folder / "my_nets.py").write_text(textwrap.dedent(FACTORY))
    return folder


def _factory(folder: Path, fn: str, **options) -> ModelConfig:
    return ModelConfig(factory=f"my_nets:{fn}", factory_path=str(folder), options=options or None)


def _train(n_updates: int, opt: str) -> TrainConfig:
    return TrainConfig(learning_rate=(RATES[opt],), max_updates=n_updates, eval_every=50, converge_when=NEVER,
                       **OPTIMIZERS[opt])


def _curves(results) -> np.ndarray:
    return np.array([r.train_loss for r in results])


FAMILIES = {
    "residual": (ModelConfig(width=8, family="residual", norm="layer", branch_scale="depth"), "tab"),
    "residual_plain": (ModelConfig(width=8, family="residual", activation="relu"), "tab"),
    # no norm, tanh, depth-scaled branches: the hand-written backward (residual.py) with every optimiser
    "residual_tanh": (ModelConfig(width=8, family="residual", branch_scale="depth"), "tab"),
    "conv": (ModelConfig(family="conv", channels=3, activation="relu"), "img"),
    "factory_cnn": (None, "img"),
}


CASES = [(f, o) for f in FAMILIES for o in OPTIMIZERS if f != "residual_plain" or o == "sgd"]


@pytest.mark.parametrize("dtype, rtol", [(torch.float64, 1e-10), (torch.float32, 1e-4)])
@pytest.mark.parametrize("family, opt", CASES)
def test_batched_trainer_follows_the_plain_torch_optim_loop(request, factory_dir, family, opt, dtype, rtol) -> None:
    # reference: each seed's own nn.Module (the same init) + autograd + torch.optim.SGD / Adam, seed by seed,
    # the same minibatch order; 200 updates, the full-training-set loss every 50
    model, data_name = FAMILIES[family]
    model = model or _factory(factory_dir, "small_cnn", channels=2)
    data = request.getfixturevalue(data_name)
    spec = CellSpec(depth=2, seeds=(0, 1), learning_rate=RATES[opt])
    train = _train(200, opt)
    batched = _curves(train_cell(spec, model, train, NO_PROBES, data, dtype=dtype))
    plain = np.array(train_plain(spec, model, train, data, dtype=dtype))
    assert batched.shape == plain.shape == (2, 4)
    np.testing.assert_allclose(batched, plain, rtol=rtol)
    assert np.all(plain[:, -1] < plain[:, 0])              # it trained: the loss fell


@pytest.mark.parametrize("opt", ["sgd", "adam"])
def test_factory_path_reproduces_the_builtin_mlp_with_probes(tab, factory_dir, opt) -> None:
    # reference: depthplan's own hand-written mlp trainer (loop.py); the factory builds the same
    # module with the same init and goes through torch.func.vmap instead. Probes included: the same
    # layers' displacements and gradient SNR from the same probe draws.
    spec = CellSpec(depth=3, seeds=(0, 1, 2), learning_rate=RATES[opt])
    train = replace(_train(120, opt), eval_every=20)
    probes = ProbeConfig(n_points=5, snr_window=4)
    builtin = train_cell(spec, ModelConfig(width=8), train, probes, tab, dtype=torch.float64)
    factory = train_cell(spec, _factory(factory_dir, "mlp"), train, probes, tab, dtype=torch.float64)
    for a, b in zip(builtin, factory):
        np.testing.assert_allclose(b.train_loss, a.train_loss, rtol=1e-10)
        np.testing.assert_allclose(b.displacement, a.displacement, rtol=1e-9)
        np.testing.assert_allclose(b.snr_db, a.snr_db, rtol=1e-7)      # NaN (below the floor) in the same places
        assert (b.n_params, b.status, b.iterations) == (a.n_params, a.status, a.iterations)
        assert (a.family, b.family) == ("mlp", "factory") and b.model_options == "my_nets:mlp {}"
    f32 = train_cell(spec, _factory(factory_dir, "mlp"), train, NO_PROBES, tab)
    np.testing.assert_allclose(_curves(f32), _curves(builtin), rtol=1e-4)


def test_factory_path_probes_each_seed_at_its_own_t_as_the_builtin_mlp(tab, factory_dir) -> None:
    # reference: depthplan's own mlp trainer (loop.py), whose schedule and information probe
    # tests/train/test_loop.py checks against the plain per-seed loop. Seeds converge at different
    # T (invented threshold), so each one's dense and sparse probe lists end at its own T.
    spec = CellSpec(depth=2, seeds=(0, 1, 2), learning_rate=0.05)
    train = replace(_train(300, "sgd"), eval_every=10, converge_when=ConvergeConfig(train_loss_below=0.9))
    probes = ProbeConfig(n_points=5, snr_window=4, information=True, information_bins=10)
    builtin = train_cell(spec, ModelConfig(width=8), train, probes, tab, dtype=torch.float64)
    factory = train_cell(spec, _factory(factory_dir, "mlp"), train, probes, tab, dtype=torch.float64)
    assert len({r.iterations for r in builtin}) > 1 and all(r.status == "converged" for r in builtin)
    for a, b in zip(builtin, factory):
        assert (b.status, b.iterations, b.probe_steps, b.snr_steps) == (a.status, a.iterations, a.probe_steps,
                                                                        a.snr_steps)
        assert b.probe_steps[-1] == b.snr_steps[-1] == b.iterations
        assert len(b.probe_steps) > len(b.snr_steps) and set(b.snr_steps) <= set(b.probe_steps)
        np.testing.assert_allclose(b.displacement, a.displacement, rtol=1e-9)
        np.testing.assert_allclose(b.snr_db, a.snr_db, rtol=1e-7)
        np.testing.assert_allclose(b.information_xt, a.information_xt, atol=1e-9)
        np.testing.assert_allclose(b.information_ty, a.information_ty, atol=1e-9)


def test_residual_information_at_t_equals_the_estimator_on_the_plain_network(tab) -> None:
    # reference: the plain per-seed ResidualNet (torch.optim, reference.probe_plain) at the same T,
    # walked by hand: each weight layer's representation is the input of the next weight layer
    # (a block's act(norm(h)), the stream h before the readout) and the readout's softmax, put
    # through the binning estimator (checked against closed forms in tests/test_information.py)
    model, spec = ModelConfig(width=8, family="residual", norm="layer"), CellSpec(depth=2, seeds=(0, 1),
                                                                                  learning_rate=0.05)
    train = replace(_train(60, "sgd"), eval_every=20)
    probes = ProbeConfig(n_points=5, snr_window=4, information=True, information_bins=10)
    results = train_cell(spec, model, train, probes, tab, dtype=torch.float64)
    plain = probe_plain(spec, model, train, probes, tab, dtype=torch.float64)
    x = torch.from_numpy(tab.x_train).double()
    assert len(x) <= INFORMATION_ROWS                   # the probe's fixed batch is the whole training set
    for r, p in zip(results, plain):
        assert r.snr_steps[-1] == r.iterations == p["iterations"] == 60 and r.probe_steps == tuple(p["probe_steps"])
        net, reps = p["net"], []
        with torch.no_grad():
            h = net.input(x)
            for block in net.blocks:
                reps.append(block.act(block.norm(h)))
                h = h + net.branch * block(h)
            reps += [h, torch.softmax(net.readout(h), dim=1)]
        assert len(r.information_xt) == len(reps) == 4
        for j, o in enumerate(reps):
            i_xt, i_ty = binned_information(o.numpy(), tab.y_train, 10)
            assert r.information_xt[j][-1] == pytest.approx(i_xt, abs=1e-9)
            assert r.information_ty[j][-1] == pytest.approx(i_ty, abs=1e-9)
        assert all(len(v) == len(r.snr_steps) for v in r.information_xt + r.information_ty)


def test_built_in_networks_have_the_documented_shape(tab, img) -> None:
    res = build_network(ModelConfig(width=8, family="residual", norm="layer"), tab.input_shape, 4, 3, seed=0)
    assert isinstance(res, ResidualNet) and len(res.blocks) == 4 and res.branch == 1.0
    assert isinstance(res.blocks[0].norm, torch.nn.LayerNorm)
    scaled = build_network(ModelConfig(width=8, family="residual", branch_scale="depth"), tab.input_shape, 16, 3, 0)
    assert scaled.branch == pytest.approx(0.25)                       # 1/sqrt(16)
    # common random numbers: seed 0 gets the same input projection and first block at every depth
    assert torch.equal(scaled.input.weight, build_network(ModelConfig(width=8, family="residual"),
                                                          tab.input_shape, 2, 3, 0).input.weight)
    conv = build_network(ModelConfig(family="conv", channels=5), img.input_shape, 3, 10, seed=1)
    assert isinstance(conv, ConvNet) and len(conv.blocks) == 3
    x = torch.from_numpy(img.x_train[:4]).view(4, *img.input_shape)
    assert img.input_shape == (1, 8, 8) and conv(x).shape == (4, 10)
    assert conv.blocks[1][0].weight.shape == (5, 5, 3, 3) and conv.blocks[1][0].padding == (1, 1)


def test_probes_record_one_series_per_weight_tensor(tab) -> None:
    spec = CellSpec(depth=3, seeds=(0, 1), learning_rate=0.05)
    model = ModelConfig(width=8, family="residual", norm="layer")
    train = replace(_train(60, "sgd"), eval_every=20)
    (r, _) = train_cell(spec, model, train, ProbeConfig(n_points=5, snr_window=4), tab)
    # input projection, three blocks, readout: five weight matrices (LayerNorm gains and biases are not layers)
    assert len(r.displacement) == len(r.snr_db) == 5
    assert r.probe_steps[0] == 1 and r.probe_steps[-1] == 60
    assert all(len(d) == len(r.probe_steps) for d in r.displacement)
    assert r.displacement[0][0] > 0 and r.family == "residual"
    assert r.model_options == "branch_scale=1; norm=layer"
    assert r.n_params == 10 * 8 + 8 + 3 * (8 * 8 + 8 + 2 * 8) + 8 * 3 + 3


@pytest.mark.parametrize("fn, pattern", [
    ("nowhere:mlp", r"model\.factory: cannot import nowhere from .* \(ModuleNotFoundError"),
    ("my_nets:absent", r"model\.factory: my_nets has no function absent \(found nothing\)"),
    ("my_nets:NOT_CALLABLE", r"model\.factory: my_nets has no function NOT_CALLABLE \(found a int\)"),
    ("my_nets:not_a_module", r"model\.factory: my_nets:not_a_module\(depth=1, n_inputs=10, n_classes=3\) "
                             r"returned a list, expected a torch\.nn\.Module"),
    ("my_nets:wrong_shape", r"model\.factory: the depth-1 network maps a batch of shape \(2, 10\) to \(2, 4\), "
                            r"expected \(2, 3\)"),
    ("my_nets:raises", r"model\.factory: my_nets:raises\(.*\) raised RuntimeError: no GPU here"),
    ("my_nets:with_dropout", r"model\.factory: the depth-1 network cannot be batched over seeds with "
                             r"torch\.func\.vmap \(RuntimeError: vmap: called random operation"),
])
def test_a_bad_factory_is_one_line_naming_model_factory(tab, factory_dir, fn, pattern) -> None:
    model = ModelConfig(factory=fn, factory_path=str(factory_dir))
    with pytest.raises(ConfigError, match=pattern) as err:
        check_model(model, tab, (1, 4))
    assert "\n" not in str(err.value)


def test_a_seed_that_converges_leaves_and_the_others_train_as_if_alone(tab) -> None:
    model, seeds = ModelConfig(width=8, family="residual", norm="layer"), (0, 1, 2)
    free = _curves(train_cell(CellSpec(2, seeds, 0.05), model, replace(_train(100, "sgd"), eval_every=20),
                              NO_PROBES, tab, dtype=torch.float64))
    fast = int(np.argmin(free[:, 1]))
    others_best = min(free[s, :2].min() for s in range(3) if s != fast)
    assert free[fast, 1] < others_best
    train = replace(_train(100, "sgd"), eval_every=20,
                    converge_when=ConvergeConfig(train_loss_below=float(free[fast, 1] + others_best) / 2))
    together = train_cell(CellSpec(2, seeds, 0.05), model, train, NO_PROBES, tab, dtype=torch.float64)
    assert together[fast].status == "converged" and together[fast].iterations == 40
    for k, seed in enumerate(seeds):      # reference: the same seed trained alone
        alone = train_cell(CellSpec(2, (seed,), 0.05), model, train, NO_PROBES, tab, dtype=torch.float64)[0]
        assert (alone.status, alone.iterations) == (together[k].status, together[k].iterations)
        np.testing.assert_allclose(alone.train_loss, together[k].train_loss, rtol=1e-12)
