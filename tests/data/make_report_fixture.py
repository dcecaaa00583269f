"""Write tests/data/report-folder/: a small results folder cut from a real demo sweep.

Keeps seeds 0-2 of every depth of `results/demo` (or the folder given), every
5th point of each loss curve (and the last), and four significant digits, so
that the report tests read measured runs without training anything.

    python tests/data/make_report_fixture.py [results/demo]
"""
from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path

from depthplan.config import load_config
from depthplan.records import RunResult, write_runs_csv
from depthplan.fitting.inputs import read_jsonl

HERE = Path(__file__).resolve().parent
SEEDS = (0, 1, 2)


def _round(v: object) -> object:
    if isinstance(v, float):
        return float(f"{v:.4g}")
    if isinstance(v, list):
        return [_round(x) for x in v]
    return v


def _trim(run: RunResult) -> RunResult:
    d = run.to_dict()
    keep = sorted(set(range(0, len(d["eval_steps"]), 5)) | {len(d["eval_steps"]) - 1})
    d["eval_steps"] = [d["eval_steps"][i] for i in keep]
    d["train_loss"] = [d["train_loss"][i] for i in keep]
    d = {k: _round(v) for k, v in d.items()}
    return RunResult.from_dict(d)


def main(source: Path) -> None:
    out = HERE / "report-folder"
    if out.exists():
        shutil.rmtree(out)
    out.mkdir()
    runs = [_trim(r) for r in read_jsonl(source / "runs.jsonl") if r.seed in SEEDS]
    (out / "runs.jsonl").write_text("".join(json.dumps(r.to_dict()) + "\n" for r in runs))
    write_runs_csv(runs, out / "runs.csv")
    text = (source / "config.yaml").read_text()
    head, _, tail = text.partition("  seeds:\n")
    rest = tail.split("\n")
    while rest and rest[0].startswith("  - "):
        rest.pop(0)
    (out / "config.yaml").write_text(head + "  seeds:\n" + "".join(f"  - {s}\n" for s in SEEDS)
                                     + "\n".join(rest))
    info = json.loads((source / "sweep.json").read_text())
    info.update(seeds=list(SEEDS), fingerprint=load_config(out / "config.yaml").fingerprint(),
                storage="sqlite:///store.db", config_file="configs/demo.yaml")
    if isinstance(info.get("seeds_per_depth"), dict):
        info["seeds_per_depth"] = {k: len(SEEDS) for k in info["seeds_per_depth"]}
    (out / "sweep.json").write_text(json.dumps(info, indent=2) + "\n")
    print(f"wrote {out}: {len(runs)} runs")


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else HERE.parent.parent / "results" / "demo")
