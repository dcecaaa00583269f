"""Predict, then verify, on the demo: how well three proxy widths predict a fourth.

    python benchmarks/transfer_check.py                 # the demo sweep, 2 workers
    python benchmarks/transfer_check.py --out DIR       # keep (and resume) the sweep in DIR

Runs the demo sweep `configs/demo.yaml` (our synthetic scenario at widths 16, 24, 32; width 64 held out;
target width 128) with `run_sweep`, so the prediction for width 64 is stored before width 64
trains; then fits the folder as `depthplan fit` does and prints, for the held-out width, the
prediction (with when it was stored) against the measurement: K*, s and the depth to plan for, and
whether the measured K* fell inside the prediction interval widened by its own spread. Also prints
the wall and CPU time of the sweep, the per-width K* and s, and the target's figures.

The last line is `held_out_inside: <true|false|none>`.
"""
from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))


def _ci(ci: list[float] | None, fmt: str = ".1f") -> str:
    return f"[{ci[0]:{fmt}}, {ci[1]:{fmt}}]" if ci and None not in ci else "[n/a]"


def _cpu_seconds() -> float:
    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", help="results folder (default: a temporary one)")
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()
    from depthplan.config import load_config
    from depthplan.fitting import fit_path
    from depthplan.sweep.run import run_sweep

    cfg = load_config(ROOT / "configs" / "demo.yaml")
    out = Path(args.out) if args.out else Path(tempfile.mkdtemp(prefix="depthplan-transfer-"))
    t0, c0 = time.perf_counter(), _cpu_seconds()
    summary = run_sweep(cfg, out=out, workers=args.workers, show_progress=False)
    wall, cpu = time.perf_counter() - t0, _cpu_seconds() - c0
    load = os.getloadavg()[0]
    print(f"sweep: {summary.n_runs} seed runs, {summary.n_trained} cells trained now in {wall:.0f} s wall, "
          f"{cpu:.0f} s CPU ({args.workers} workers; load average {load:.1f} on {os.cpu_count()} cores at the end)")
    fit, _ = fit_path(out)
    t = fit["transfer"]
    for s in t["sizes"]:
        k = f"{s['reversal_depth']:.1f} {_ci(s['reversal_depth_ci'])}" if s["reversal_depth"] else s["reversal_status"]
        print(f"  width {s['width']:>4} (in the fit): K* {k}, s {s['slope']:.2f} {_ci(s['slope_ci'], '.2f')}, "
              f"plan for {s['depth_to_plan_for']}")
    for s in t.get("skipped_sizes") or []:
        print(f"  width {s['width']:>4} skipped: {s['reason']}")
    v = t.get("verify") or {}
    p, m = v.get("predicted") or {}, v.get("measured") or {}
    print(f"held-out width {v.get('width')}: prediction {v.get('prediction_source')} "
          f"(stored {v.get('predicted_at') or 'never'})")
    print(f"  {'':14} {'predicted':>26} {'measured':>26}")
    for key, name, fmt in (("reversal_depth", "K*", ".1f"), ("slope", "s", ".2f")):
        pv, mv = p.get(key), m.get(key)
        print(f"  {name:14} {(f'{pv:{fmt}} ' + _ci(p.get(key + '_ci'), fmt)) if pv is not None else 'n/a':>26} "
              f"{(f'{mv:{fmt}} ' + _ci(m.get(key + '_ci'), fmt)) if mv is not None else 'n/a':>26}")
    rng = p.get("depth_to_plan_for_range")
    print(f"  {'plan for':14} {str(p.get('depth_to_plan_for')) + (f' [{rng[0]}, {rng[1]}]' if rng else ''):>26} "
          f"{str(m.get('depth_to_plan_for')):>26}")
    ci = (v.get("compared_interval") or {}).get("reversal_depth")
    print(f"  K* interval widened by the measurement's spread: {_ci(ci)}; {v.get('verdict')}")
    tg = t.get("target") or {}
    if tg:
        span = tg.get("depth_to_plan_for_range")
        plan = (f"no single depth, the data allow {span[0]} to {span[1]}" if tg.get("plan_settled") is False and span
                else f"plan for {tg.get('depth_to_plan_for')} {span}")
        print(f"target width {tg.get('width')} ({tg.get('extrapolation_factor')}): {plan}, "
              f"K* {tg.get('reversal_depth') or float('nan'):.1f} {_ci(tg.get('reversal_depth_ci'))}"
              + (" (past the swept depths)" if tg.get("past_swept_depths") else ""))
    inside = v.get("inside")
    print(f"held_out_inside: {'none' if inside is None else str(inside).lower()}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
