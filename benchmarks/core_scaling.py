"""What a second worker can buy on this machine: the hardware's own ceiling, then the demo.

    python benchmarks/core_scaling.py                  # about 9 minutes on 2 cores
    python benchmarks/core_scaling.py --parts ceiling  # the ceiling only, under a minute

`depthplan run` hands cells to one single-threaded worker process per core. How much faster
N workers can be than one is bounded by how much faster N copies of the same training run
go than one copy alone: cores that share a memory bus, a cache or a physical core (a cloud
VM's vCPUs may be hyperthreads) slow each other down. Part 1 measures that bound directly.
The workload is one batched training cell (`train_cell`: scikit-learn's digits, K = 8,
width 32, tanh, 16 seeds x 5,000 updates, the full-training-set loss every 50 updates,
no seed stopping early), run in a fresh process alone and then as N copies started at the
same moment; the ceiling is N x (time alone) / (time of the slowest copy), median over
rounds. Part 2 runs the built-in demo (`depthplan demo -q`, fit and report included) with
`--workers 1` and with the default (one per available core), alternating, and prints the
median wall-time ratio next to the ceiling. One torch thread in every process throughout. Part 3 times
what runs after training, `depthplan report` of a copy of the committed demo results (the fit of
its four proxy sizes, then 6 figures as PNG and SVG), in one process (`DEPTHPLAN_SERIAL=1`)
against helpers forked one per core (`depthplan.forked`), alternating, median over rounds.

Parts 2 and 3 end in `demo_workers_ratio: <ratio> (ceiling <ratio>)` and `report_forked_ratio: <ratio>`.
"""
from __future__ import annotations

import argparse
import math
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from depthplan.forked import available_cores  # noqa: E402  (torch-free: `--workers`' own default)

CELL = """
import sys, time, torch
torch.set_num_threads(1)
sys.path.insert(0, {root!r})
from depthplan.config import ConvergeConfig, ModelConfig, ProbeConfig, TrainConfig
from depthplan.records import CellSpec
from depthplan.train.datasets import load_dataset
from depthplan.config import DataConfig
from depthplan.train.loop import train_cell
data = load_dataset(DataConfig(source="digits"))
spec = CellSpec(depth=8, seeds=tuple(range(16)), learning_rate=0.05)
train = TrainConfig(learning_rate=(0.05,), batch_size=32, max_updates={updates}, eval_every=50,
                    converge_when=ConvergeConfig(train_loss_below=1e-12))
probes = ProbeConfig(displacement=False, snr=False)
sys.stdout.write("ready\\n"); sys.stdout.flush()
sys.stdin.readline()                      # every copy starts on the same signal
t = time.perf_counter()
train_cell(spec, ModelConfig(width=32, activation="tanh"), train, probes, data)
print(time.perf_counter() - t)
"""


def run_copies(n: int, updates: int) -> list[float]:
    """Seconds each of n simultaneous copies of the cell took, started together once all have loaded."""
    env = dict(os.environ, OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    code = CELL.format(root=str(ROOT), updates=updates)
    procs = [subprocess.Popen([sys.executable, "-c", code], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                              text=True, env=env) for _ in range(n)]
    for p in procs:
        if p.stdout.readline().strip() != "ready":
            raise SystemExit("core_scaling: a copy of the training cell failed to start")
    for p in procs:
        p.stdin.write("go\n")
        p.stdin.flush()
    times = []
    for p in procs:
        out, _ = p.communicate()
        if p.returncode != 0:
            raise SystemExit(f"core_scaling: a copy of the training cell exited with {p.returncode}")
        times.append(float(out.strip().splitlines()[-1]))
    return times


def ceiling(n: int, rounds: int, updates: int) -> float:
    ratios = []
    for r in range(rounds):
        alone = run_copies(1, updates)[0]
        together = run_copies(n, updates)
        ratio = n * alone / max(together)
        ratios.append(ratio)
        print(f"  round {r + 1}: alone {alone:.2f} s; {n} together "
              + ", ".join(f"{t:.2f}" for t in together) + f" s -> {ratio:.2f}x", flush=True)
    return statistics.median(ratios)


def demo_seconds(workers: int | None) -> float:
    with tempfile.TemporaryDirectory() as tmp:
        cmd = [sys.executable, "-m", "depthplan", "demo", "-q", "--out", str(Path(tmp) / "demo")]
        if workers is not None:
            cmd += ["--workers", str(workers)]
        t = time.perf_counter()
        done = subprocess.run(cmd, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        seconds = time.perf_counter() - t
    if done.returncode != 0:
        raise SystemExit(f"core_scaling: the demo failed: {done.stderr.strip()[-300:]}")
    return seconds


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--updates", type=int, default=5000)
    ap.add_argument("--parts", default="ceiling,demo,report",
                    help="comma-separated: ceiling (part 1), demo (part 2), report (part 3)")
    args = ap.parse_args(argv)
    parts = set(args.parts.split(","))
    if not parts <= {"ceiling", "demo", "report"}:
        ap.error(f"--parts: expected ceiling, demo or report, got {args.parts!r}")
    n = available_cores()
    print(f"cores available to this process: {n}; load average {os.getloadavg()[0]:.2f}")
    if n < 2:
        print("one core: a second worker cannot help here")
        return 0
    top = math.nan
    if "ceiling" in parts:
        print(f"part 1: one training cell alone against {n} copies at once")
        top = ceiling(n, args.rounds, args.updates)
        print(f"ceiling for {n} workers: {top:.2f}x")
    if "demo" in parts:
        print(f"part 2: `depthplan demo` with 1 worker and with the default ({n})")
        pairs = []
        for r in range(args.rounds):
            order = (1, None) if r % 2 == 0 else (None, 1)
            got = {w: demo_seconds(w) for w in order}
            pairs.append(got[1] / got[None])
            print(f"  round {r + 1}: 1 worker {got[1]:.1f} s, {n} workers {got[None]:.1f} s -> {pairs[-1]:.2f}x "
                  f"(load {os.getloadavg()[0]:.2f})", flush=True)
        print(f"demo_workers_ratio: {statistics.median(pairs):.2f}x (ceiling {top:.2f}x)")
    if "report" in parts:
        report_part(n, args.rounds)
    return 0


def report_seconds(serial: bool) -> float:
    import shutil

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "demo"
        shutil.copytree(ROOT / "results" / "demo", folder)
        (folder / "fit.json").unlink(missing_ok=True)            # the report fits first, as after a run
        env = dict(os.environ, DEPTHPLAN_SERIAL="1" if serial else "0")
        t = time.perf_counter()
        done = subprocess.run([sys.executable, "-m", "depthplan", "report", str(folder)], cwd=ROOT, env=env,
                              stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        seconds = time.perf_counter() - t
    if done.returncode != 0:
        raise SystemExit(f"core_scaling: the report failed: {done.stderr.strip()[-300:]}")
    return seconds


def report_part(n: int, rounds: int) -> None:
    print(f"part 3: `depthplan report` of the demo results in one process and over {n} forked helpers")
    pairs = []
    for r in range(rounds):
        order = (True, False) if r % 2 == 0 else (False, True)
        got = {serial: report_seconds(serial) for serial in order}
        pairs.append(got[True] / got[False])
        print(f"  round {r + 1}: one process {got[True]:.2f} s, forked {got[False]:.2f} s -> {pairs[-1]:.2f}x "
              f"(load {os.getloadavg()[0]:.2f})", flush=True)
    print(f"report_forked_ratio: {statistics.median(pairs):.2f}x")


if __name__ == "__main__":
    raise SystemExit(main())
