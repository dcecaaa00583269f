"""How fast depthplan trains, side by side with the loops a user would otherwise write.

    python benchmarks/trainer_speed.py            # about 6 minutes on 2 cores
    python benchmarks/trainer_speed.py --quick    # under a minute

Part 1, throughput. The same workload three ways, interleaved round by round so that
a busy machine slows them alike: depthplan's batched trainer (`train_cell`, all seeds
as one stacked model), the plain per-seed PyTorch loop (`train_plain`: `nn.Sequential`
+ `torch.optim.SGD`, same init and batch order), and scikit-learn's MLPClassifier with
its sgd solver. Workload: scikit-learn's digits (64 features, 10 classes, 1,437
training rows), width 32, tanh, batch 32, SGD at a fixed rate, 16 seeds x 2,000
updates, the full-training-set loss every 50 updates, no seed stopping early. For each
depth K it prints seed-updates/s, the ratio to the plain loop (median over rounds of
the ratio measured within one round), achieved GFLOP/s and that rate as a fraction of
this machine's own large float32 matrix-multiply rate. One thread throughout.

FLOPs counted per seed-update: 2 per multiply-add of every weight matrix, for the
forward pass, the weight gradient and the gradient passed down (none below the
first layer), plus the evaluation's forward pass spread over `eval_every` updates.
MLPClassifier evaluates nothing between epochs, so its count has no evaluation share.
Then a width axis (32, 64, 128, 256 at K = 4): depthplan against the plain loop, with the
fraction of the matmul peak (wider proxies are where a transfer sweep spends its time).

Part 2, end to end. The single-width demo sweep (`configs/one-width.yaml`) run by `run_sweep` (storage,
export and all) against the same runs done by the plain loop, each seed stopping at
the same convergence rule; it also reports how many runs agree on the updates to
convergence. `--quick` cuts the demo to three depths and two seeds.

The last line is `speedup_vs_plain_loop K=8: <ratio>`.
"""
from __future__ import annotations

import argparse
import math
import os
import platform
import statistics
import sys
import tempfile
import time
import warnings
from dataclasses import dataclass, replace
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))            # run from a checkout without installing

import numpy as np  # noqa: E402
import torch  # noqa: E402

from depthplan.config import (ConvergeConfig, DataConfig, ModelConfig, ProbeConfig,  # noqa: E402
                              TrainConfig, config_from_dict, load_config)
from depthplan.train.datasets import Dataset, load_dataset  # noqa: E402
from depthplan.train.models import layer_sizes  # noqa: E402
from depthplan.records import CellSpec  # noqa: E402
from depthplan.fitting.inputs import load_runs  # noqa: E402
from depthplan.train.loop import train_cell  # noqa: E402
from depthplan.train.reference import train_plain  # noqa: E402

DEPTHS = (1, 4, 8)


@dataclass(frozen=True)
class Plan:
    n_updates: int          # per seed, every method
    rounds: int             # interleaved repetitions; ratios are medians over these
    plain_seeds: int        # seeds per round for the loops that go seed by seed
    sklearn_seeds: int


FULL = Plan(n_updates=2000, rounds=5, plain_seeds=4, sklearn_seeds=2)
QUICK = Plan(n_updates=400, rounds=3, plain_seeds=2, sklearn_seeds=1)
N_SEEDS = 16
EVAL_EVERY = 50
WIDTH = 32
BATCH = 32
LR = 0.05


# --------------------------------------------------------------------------- the machine

def cpu_name() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def matmul_gflops(n: int = 2048, repeats: int = 5) -> float:
    """This machine's float32 rate on one large square matrix product (one thread), best of a few."""
    a, b = torch.randn(n, n), torch.randn(n, n)
    a @ b
    best = math.inf
    for _ in range(repeats):
        t = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - t)
    return 2 * n ** 3 / best / 1e9


# --------------------------------------------------------------------------- part 1: throughput

def flops_per_update(n_in: int, depth: int, n_out: int, n_rows: int, with_eval: bool, width: int = WIDTH) -> float:
    """Matrix-multiply FLOPs of one seed-update (see the module docstring)."""
    macs = sum(i * o for i, o in layer_sizes(n_in, (width,) * depth, n_out))
    train = 2 * BATCH * (3 * macs - n_in * width)
    return train + (2 * n_rows * macs / EVAL_EVERY if with_eval else 0.0)


def time_depthplan(data: Dataset, depth: int, n_updates: int, width: int = WIDTH) -> float:
    """Seed-updates per second of `train_cell` on all seeds at once."""
    spec = CellSpec(depth=depth, seeds=tuple(range(N_SEEDS)), learning_rate=LR)
    train = TrainConfig(learning_rate=(LR,), batch_size=BATCH, max_updates=n_updates, eval_every=EVAL_EVERY,
                        converge_when=ConvergeConfig(train_loss_below=1e-12))   # nobody stops early
    probes = ProbeConfig(displacement=False, snr=False)
    t = time.perf_counter()
    runs = train_cell(spec, ModelConfig(width=width, activation="tanh"), train, probes, data)
    return sum(r.iterations for r in runs) / (time.perf_counter() - t)


def time_plain(data: Dataset, depth: int, n_updates: int, seeds: tuple[int, ...], width: int = WIDTH) -> float:
    """Seed-updates per second of the plain per-seed PyTorch loop."""
    spec = CellSpec(depth=depth, seeds=seeds, learning_rate=LR)
    train = TrainConfig(learning_rate=(LR,), batch_size=BATCH, max_updates=n_updates, eval_every=EVAL_EVERY)
    t = time.perf_counter()
    train_plain(spec, ModelConfig(width=width, activation="tanh"), train, data)
    return len(seeds) * n_updates / (time.perf_counter() - t)


def time_sklearn(data: Dataset, depth: int, n_updates: int, seeds: tuple[int, ...]) -> float:
    """Seed-updates per second of scikit-learn's MLPClassifier, sgd solver, same sizes and rate."""
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.neural_network import MLPClassifier

    per_epoch = math.ceil(len(data.y_train) / BATCH)
    epochs = max(1, round(n_updates / per_epoch))
    t = time.perf_counter()
    for seed in seeds:
        net = MLPClassifier(hidden_layer_sizes=(WIDTH,) * depth, activation="tanh", solver="sgd",
                            learning_rate="constant", learning_rate_init=LR, momentum=0.0,
                            nesterovs_momentum=False, alpha=0.0, batch_size=BATCH, max_iter=epochs,
                            tol=0.0, n_iter_no_change=epochs + 1, shuffle=True, random_state=seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)   # it stops at max_iter, as asked
            net.fit(data.x_train, data.y_train)
    return len(seeds) * epochs * per_epoch / (time.perf_counter() - t)


def throughput(data: Dataset, plan: Plan, peak: float) -> dict[int, float]:
    """Print one table per depth; return the median depthplan / plain-loop ratio per depth."""
    n_in, n_out, n_rows = data.n_features, data.n_classes, len(data.y_train)
    ratios = {}
    for depth in DEPTHS:
        rates: dict[str, list[float]] = {"depthplan": [], "plain loop": [], "scikit-learn": []}
        time_depthplan(data, depth, 2 * EVAL_EVERY)                  # warm-up, not timed
        for r in range(plan.rounds):
            plain_seeds = tuple(range(r * plan.plain_seeds, (r + 1) * plan.plain_seeds))
            sk_seeds = tuple(range(r * plan.sklearn_seeds, (r + 1) * plan.sklearn_seeds))
            jobs = [("depthplan", lambda: time_depthplan(data, depth, plan.n_updates)),
                    ("plain loop", lambda: time_plain(data, depth, plan.n_updates, plain_seeds)),
                    ("scikit-learn", lambda: time_sklearn(data, depth, plan.n_updates, sk_seeds))]
            for name, job in jobs[r % 3:] + jobs[:r % 3]:            # rotate who goes first
                rates[name].append(job())
        plain = rates["plain loop"]
        print(f"\nK={depth}  ({N_SEEDS} seeds x {plan.n_updates} updates for depthplan; "
              f"{plan.plain_seeds} and {plan.sklearn_seeds} seeds per round for the other two; {plan.rounds} rounds)")
        print(f"  {'method':<13} {'seed-updates/s':>15} {'vs plain loop':>14} {'GFLOP/s':>8} {'of matmul peak':>15}")
        for name, values in rates.items():
            ratio = statistics.median(v / p for v, p in zip(values, plain))
            rate = statistics.median(values)
            gflops = rate * flops_per_update(n_in, depth, n_out, n_rows, name != "scikit-learn") / 1e9
            print(f"  {name:<13} {rate:>15,.0f} {ratio:>13.1f}x {gflops:>8.1f} {gflops / peak:>14.1%}")
            if name == "depthplan":
                ratios[depth] = ratio
    return ratios


WIDTHS = (32, 64, 128, 256)
WIDTH_DEPTH = 4


def width_axis(data: Dataset, plan: Plan, peak: float) -> dict[int, float]:
    """Throughput against width at K = 4 (the proxies a transfer sweep trains): depthplan and the plain
    loop interleaved round by round; returns depthplan's fraction of the matmul peak per width."""
    n_in, n_out, n_rows = data.n_features, data.n_classes, len(data.y_train)
    n_updates = max(2 * EVAL_EVERY, plan.n_updates // 4)
    print(f"\nWidth axis at K={WIDTH_DEPTH} ({N_SEEDS} seeds x {n_updates} updates for depthplan, "
          f"{plan.plain_seeds} seeds per round for the plain loop, {plan.rounds} rounds)")
    print(f"  {'width':>5} {'depthplan seed-updates/s':>25} {'vs plain loop':>14} {'GFLOP/s':>8} {'of matmul peak':>15}")
    fractions = {}
    for width in WIDTHS:
        time_depthplan(data, WIDTH_DEPTH, 2 * EVAL_EVERY, width)           # warm-up, not timed
        ours, plain = [], []
        for r in range(plan.rounds):
            seeds = tuple(range(r * plan.plain_seeds, (r + 1) * plan.plain_seeds))
            jobs = [lambda: ours.append(time_depthplan(data, WIDTH_DEPTH, n_updates, width)),
                    lambda: plain.append(time_plain(data, WIDTH_DEPTH, n_updates, seeds, width))]
            for job in (jobs if r % 2 == 0 else jobs[::-1]):
                job()
        ratio = statistics.median(a / b for a, b in zip(ours, plain))
        rate = statistics.median(ours)
        gflops = rate * flops_per_update(n_in, WIDTH_DEPTH, n_out, n_rows, True, width) / 1e9
        fractions[width] = gflops / peak
        print(f"  {width:>5} {rate:>25,.0f} {ratio:>13.1f}x {gflops:>8.1f} {gflops / peak:>14.1%}")
    return fractions


# --------------------------------------------------------------------------- part 2: the demo sweep

def demo_config(quick: bool):
    cfg = load_config(ROOT / "configs" / "one-width.yaml")
    if not quick:
        return cfg
    d = cfg.to_dict()
    d["sweep"]["depths"] = [2, 4, 8]
    d["sweep"]["seeds"] = [0, 1]
    return config_from_dict(d, base_dir=ROOT / "configs")


def sensitivity(cfg, data: Dataset, depth: int, n_updates: int) -> str:
    """How far the plain loop itself moves when its learning rate changes by one part in 1e13."""
    train = replace(cfg.train, max_updates=n_updates, eval_every=n_updates)
    lr = cfg.train.learning_rate[0]
    a, b = (train_plain(CellSpec(depth, (0,), rate), cfg.model, train, data, dtype=torch.float64)[0][-1]
            for rate in (lr, lr * (1 + 1e-13)))
    return (f"at K={depth}, the plain loop in float64 with its learning rate changed by 1e-13 ends "
            f"{abs(a - b) / a:.0e} apart in loss after {n_updates} updates, so rounding alone "
            f"can move the evaluation that first meets the criterion")


def end_to_end(quick: bool) -> None:
    from depthplan.sweep.run import run_sweep

    cfg = demo_config(quick)
    with tempfile.TemporaryDirectory() as folder:
        t = time.perf_counter()
        run_sweep(cfg, out=folder, show_progress=False)
        t_depthplan = time.perf_counter() - t
        runs = load_runs(Path(folder))
    torch.set_num_threads(1)                # as train_cell does inside run_sweep
    cells: dict[tuple[int, float], list] = {}
    for r in runs:
        cells.setdefault((r.depth, r.learning_rate), []).append(r)
    t = time.perf_counter()
    data = load_dataset(cfg.data)
    agree: dict[int, list[bool]] = {}
    for (depth, lr), group in sorted(cells.items()):
        group.sort(key=lambda r: r.seed)
        spec = CellSpec(depth=depth, seeds=tuple(r.seed for r in group), learning_rate=lr)
        losses = train_plain(spec, cfg.model, cfg.train, data, until_converged=True)
        agree.setdefault(depth, []).extend(len(ls) * cfg.train.eval_every == r.iterations
                                           for ls, r in zip(losses, group))
    t_plain = time.perf_counter() - t
    updates = sum(r.iterations for r in runs)
    print(f"\nDemo sweep end to end ({'cut to ' if quick else ''}depths {sorted(agree)}, {len(runs)} runs, "
          f"{updates:,} seed-updates in all, one thread each):")
    print(f"  depthplan run_sweep (store, export included) {t_depthplan:8.1f} s")
    print(f"  plain per-seed loop, same runs and stopping   {t_plain:8.1f} s")
    print(f"  speedup {t_plain / t_depthplan:.1f}x")
    print("  same updates to convergence in both, per depth: "
          + ", ".join(f"K={k} {sum(v)}/{len(v)}" for k, v in agree.items()))
    differ = [k for k, v in agree.items() if not all(v)]
    if differ:
        typical = int(np.median([r.iterations for r in runs if r.depth == min(differ)]))
        print(f"  (where they differ, the runs are chaotic: {sensitivity(cfg, data, min(differ), typical)})")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="fewer updates and rounds; a cut-down demo")
    args = parser.parse_args(argv)
    plan = QUICK if args.quick else FULL
    torch.set_num_threads(1)
    peak = matmul_gflops()
    print(f"machine: {cpu_name()}, {os.cpu_count()} cores; Python {platform.python_version()}, "
          f"torch {torch.__version__}, numpy {np.__version__}")
    print(f"one thread; large float32 matmul (2048^3): {peak:.0f} GFLOP/s")
    data = load_dataset(DataConfig(source="digits"))
    t = time.perf_counter()
    ratios = throughput(data, plan, peak)
    width_axis(data, plan, peak)
    print(f"\n(part 1 took {time.perf_counter() - t:.0f} s)")
    end_to_end(args.quick)
    print(f"speedup_vs_plain_loop K=8: {ratios[8]:.1f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
