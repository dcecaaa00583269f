"""Seed-updates per second of the residual, conv and factory families, batched against the plain loop.

    python benchmarks/family_speed.py            # a few minutes on 2 cores
    python benchmarks/family_speed.py --quick    # about a minute

For each family and depth K (4 and 8), the same workload two ways, interleaved round by round
so that a busy machine slows them alike: depthplan's batched trainer (`train_cell`, every seed
stacked: batched matrix products with a hand-written backward for the built-in residual family,
grouped convolutions for conv, batched products for a factory's nn.Sequential, autograd for
both; the residual family is also run through the generic torch.func.vmap path to show what the
hand-written maths adds), and the plain per-seed loop
(`train_plain`: each seed's own `nn.Module` + `torch.optim.SGD`, same init and batch order).
Workload: scikit-learn's digits (64 features or 1x8x8 images, 10 classes, 1,437 training
rows), width / channels 32 (conv 8), tanh, batch 32, SGD at a fixed rate, 16 seeds x 300
updates (--quick: 8 seeds x 150), the full-training-set loss every 50 updates, no seed
stopping early. One thread throughout. Printed: seed-updates/s of each and the median over
rounds of the within-round ratio. Targets (issue 13): >= 5x for the vmap path, >= 10x for the
built-in residual family.
"""
from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import textwrap
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))            # run from a checkout without installing

import torch  # noqa: E402

from depthplan.config import ConvergeConfig, DataConfig, ModelConfig, ProbeConfig, TrainConfig  # noqa: E402
from depthplan.records import CellSpec  # noqa: E402
from depthplan.train import functional  # noqa: E402
from depthplan.train.datasets import load_dataset  # noqa: E402
from depthplan.train.loop import train_cell  # noqa: E402
from depthplan.train.reference import train_plain  # noqa: E402

FACTORY = """
    from torch import nn

    def plain_mlp(depth, n_inputs, n_classes, width=32):
        dims = [n_inputs] + [width] * depth
        layers = []
        for a, b in zip(dims[:-1], dims[1:]):
            layers += [nn.Linear(a, b), nn.Tanh()]
        return nn.Sequential(*layers, nn.Linear(dims[-1], n_classes))
"""


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--rounds", type=int, default=2)
    args = ap.parse_args()
    torch.set_num_threads(1)
    n_seeds, n_updates = (8, 150) if args.quick else (16, 300)
    folder = Path(tempfile.mkdtemp())
    (folder / "bench_nets.py").write_text(textwrap.dedent(FACTORY))
    tab = load_dataset(DataConfig(source="digits"))
    img = load_dataset(DataConfig(source="digits_images"))
    train = TrainConfig(learning_rate=(0.05,), max_updates=n_updates, eval_every=50,
                        converge_when=ConvergeConfig(train_loss_below=1e-12))
    probes = ProbeConfig(displacement=False, snr=False)
    cases = {
        "residual": (ModelConfig(width=32, family="residual"), tab, False),
        "residual (vmap path)": (ModelConfig(width=32, family="residual"), tab, True),
        "conv": (ModelConfig(family="conv", channels=8), img, False),
        "factory": (ModelConfig(factory="bench_nets:plain_mlp", factory_path=str(folder)), tab, False),
    }
    print(f"{n_seeds} seeds x {n_updates} updates, batch 32, one thread; {args.rounds} interleaved rounds")
    print(f"{'family':<22} {'K':>2} {'batched/s':>10} {'plain/s':>9} {'ratio':>6}")
    total = n_seeds * n_updates
    for name, (model, data, via_vmap) in cases.items():
        for depth in (4, 8):
            spec = CellSpec(depth=depth, seeds=tuple(range(n_seeds)), learning_rate=0.05)
            fast, slow, ratios = [], [], []
            for _ in range(args.rounds):
                t0 = time.perf_counter()
                if via_vmap:      # the generic path: vmap over the stacked nn.Modules
                    members = functional.build_members
                    functional.build_members = lambda m, d, k, s, dt: functional.stack_networks(
                        [functional.build_network(m, d.input_shape, k, d.n_classes, x, dt) for x in s])
                    try:
                        train_cell(spec, model, train, probes, data)
                    finally:
                        functional.build_members = members
                else:
                    train_cell(spec, model, train, probes, data)
                t1 = time.perf_counter()
                train_plain(spec, model, train, data)
                t2 = time.perf_counter()
                fast.append(total / (t1 - t0))
                slow.append(total / (t2 - t1))
                ratios.append((t2 - t1) / (t1 - t0))
            print(f"{name:<22} {depth:>2} {statistics.median(fast):>10.0f} {statistics.median(slow):>9.0f} "
                  f"{statistics.median(ratios):>5.1f}x", flush=True)


if __name__ == "__main__":
    main()
