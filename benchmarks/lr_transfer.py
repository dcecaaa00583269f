"""How much the best learning rate moves with depth in the residual family, with and without depth scaling.

    python benchmarks/lr_transfer.py            # several minutes on 2 cores
    python benchmarks/lr_transfer.py --quick    # K = 2 and 16 only, fewer rates

Published expectation: with every residual branch multiplied by 1/sqrt(K) (`branch_scale: depth`)
the best learning rate stays put as the depth K grows (Yang, Yu, Zhu and Hayou 2023, "Tensor
Programs VI", arXiv:2310.02244; Bordelon, Noci, Li, Hanin and Pehlevan 2023, "Depthwise
hyperparameter transfer in residual networks", arXiv:2309.16620), while with branch multiplier 1
it falls as K grows. Workload: scikit-learn's digits (64 features, 10 classes), the residual
family of width 16, relu, He init, no normalisation, SGD, batch 32, 200 updates, seeds 0 and 1.
Per depth K in 2, 4, 8, 16 and rate on a log grid from 1e-4 to 1 (13 rates, a third of a decade
apart), the seeds' mean training loss after the budget (a diverged seed: infinite); the tuned
rate of a depth is the grid rate with the lowest loss. The range of a curve is
log10(largest tuned rate / smallest) over the depths, in decades. The last line is
`range_ratio depth/1: <ratio>`; the unit test (tests/train/test_lr_transfer.py) runs a lighter
version and asserts the ratio is below 0.5, a threshold of our own.
"""
from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))            # run from a checkout without installing

import numpy as np  # noqa: E402
import torch  # noqa: E402

from depthplan.config import ConvergeConfig, DataConfig, ModelConfig, ProbeConfig, TrainConfig  # noqa: E402
from depthplan.records import CellSpec  # noqa: E402
from depthplan.train.datasets import load_dataset  # noqa: E402
from depthplan.train.loop import train_cell  # noqa: E402


def tuned_rates(data, depths, rates, branch_scale, *, width=16, n_updates=200, seeds=(0, 1)) -> dict[int, float]:
    """Per depth, the grid rate whose seeds reach the lowest mean training loss after `n_updates`."""
    model = ModelConfig(width=width, family="residual", activation="relu", branch_scale=branch_scale)
    probes = ProbeConfig(displacement=False, snr=False)
    best = {}
    for depth in depths:
        losses = []
        for lr in rates:
            train = TrainConfig(learning_rate=(float(lr),), max_updates=n_updates, eval_every=n_updates,
                                converge_when=ConvergeConfig(train_loss_below=1e-12))
            runs = train_cell(CellSpec(depth, tuple(seeds), float(lr)), model, train, probes, data)
            vals = [r.final_train_loss for r in runs]
            losses.append(float(np.mean(vals)) if all(math.isfinite(v) for v in vals) else math.inf)
        best[depth] = float(rates[int(np.argmin(losses))])
        print(f"  branch_scale {branch_scale or '1':>5}  K={depth:<2}  tuned rate {best[depth]:.4g}  losses "
              + " ".join("div" if math.isinf(v) else f"{v:.2f}" for v in losses), flush=True)
    return best


def decades(best: dict[int, float]) -> float:
    return math.log10(max(best.values()) / min(best.values()))


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    torch.set_num_threads(1)
    data = load_dataset(DataConfig(source="digits"))
    depths = (2, 16) if args.quick else (2, 4, 8, 16)
    rates = np.logspace(-3, 0, 7) if args.quick else np.logspace(-4, 0, 13)
    plain = decades(tuned_rates(data, depths, rates, None))
    scaled = decades(tuned_rates(data, depths, rates, "depth"))
    print(f"range of the tuned rate over K={depths[0]}..{depths[-1]}: branch_scale 1 {plain:.2f} decades, "
          f"branch_scale depth {scaled:.2f} decades")
    print(f"range_ratio depth/1: {scaled / plain:.3f}" if plain > 0 else "range_ratio depth/1: undefined (no range at 1)")


if __name__ == "__main__":
    main()
