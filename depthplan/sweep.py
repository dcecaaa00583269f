"""Expand a sweep file into cells, skip those already stored, train the rest, store each result.

`run_sweep` is what `depthplan run` calls: it prepares the output folder (and
refuses one that holds a different sweep), plans the cells into the store,
trains them in this process or in `workers` local processes, and exports
`runs.csv` / `runs.jsonl`. `work` is one worker's loop, also used by
`depthplan worker` on other machines.
"""
from __future__ import annotations

import fcntl
import json
import logging
import multiprocessing as mp
import os
import platform
import time
import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from .config import SweepFile, config_from_dict, dump_config
from .errors import ConfigError, DepthplanError, RunFailed, StoreError
from .records import CellSpec, RunResult, write_runs_csv
from .storage import Heartbeat, SweepStore, iter_json_lines, redact, resolve_url

log = logging.getLogger(__name__)


class Interrupted(DepthplanError):
    """The user stopped the sweep; what was stored stays stored."""

    exit_code = 130


def plan_cells(cfg: SweepFile) -> list[CellSpec]:
    """Every (learning rate, depth, seed block) cell of the sweep, shallow depths first."""
    seeds = cfg.sweep.seeds
    block = cfg.sweep.seeds_per_cell or len(seeds)
    cells = []
    for lr in cfg.train.learning_rate:
        for depth in cfg.sweep.depths:
            for i in range(0, len(seeds), block):
                cells.append(CellSpec(depth=depth, seeds=tuple(seeds[i:i + block]), learning_rate=lr))
    return cells


def output_folder(cfg: SweepFile, out: str | Path | None) -> Path:
    """Where results go: --out, then output.dir, then results/<name> under the working directory."""
    return Path(out or cfg.output.dir or Path("results") / cfg.name).expanduser().resolve()


@dataclass
class FolderLock:
    """Advisory lock so two `depthplan run` commands never plan into one folder at once."""

    path: Path

    def __enter__(self) -> "FolderLock":
        self._fh = self.path.open("a+")
        try:
            fcntl.flock(self._fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            self._fh.close()
            raise StoreError(f"{self.path.parent} is in use by another `depthplan run`; "
                             "wait for it, or pass --out DIR for a separate sweep") from None
        return self

    def __exit__(self, *exc: Any) -> None:
        fcntl.flock(self._fh, fcntl.LOCK_UN)
        self._fh.close()


def _differences(old: dict, new: dict, prefix: str = "") -> list[str]:
    keys = sorted(set(old) | set(new))
    out = []
    for k in keys:
        a, b = old.get(k), new.get(k)
        path = f"{prefix}{k}"
        if isinstance(a, dict) and isinstance(b, dict):
            out += _differences(a, b, path + ".")
        elif a != b:
            out.append(path)
    return out


def open_sweep(cfg: SweepFile, folder: Path, url: str) -> SweepStore:
    """Open (or create) the sweep's store and check it holds this very sweep.

    Raises:
        StoreError: the store holds a sweep of another config.
    """
    store = SweepStore(url, cfg.name, create=True)
    meta = store.meta()
    if "fingerprint" not in meta:
        store.set_meta("fingerprint", cfg.fingerprint())
        store.set_meta("config", cfg.to_dict())
        store.set_meta("created", time.strftime("%Y-%m-%dT%H:%M:%S%z"))
    elif meta["fingerprint"] != cfg.fingerprint():
        changed = _differences({k: v for k, v in meta.get("config", {}).items() if k not in ("output", "name")},
                               {k: v for k, v in cfg.to_dict().items() if k not in ("output", "name")})
        what = f" (changed: {', '.join(changed[:5])})" if changed else ""
        raise StoreError(f"{folder} already holds sweep '{cfg.name}' run with a different config{what}; "
                         "pass --out DIR to run the changed sweep in a new folder, or restore the old settings to finish this one")
    return store


def write_sidecars(cfg: SweepFile, folder: Path, store: SweepStore) -> None:
    """The resolved config and sweep facts beside the results (so every number traces to its settings)."""
    (folder / "config.yaml").write_text(dump_config(cfg))
    info = {"name": cfg.name, "fingerprint": cfg.fingerprint(), "storage": redact(store.url),
            "eval_every": cfg.train.eval_every, "max_updates": cfg.train.max_updates,
            "depths": list(cfg.sweep.depths), "seeds": list(cfg.sweep.seeds),
            "learning_rates": list(cfg.train.learning_rate), "config_file": cfg.source_path}
    _atomic_write(folder / "sweep.json", json.dumps(info, indent=2) + "\n")


def _atomic_write(path: Path, text: str) -> None:
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_text(text)
    tmp.replace(path)


def export_runs(store: SweepStore, folder: Path) -> list[RunResult]:
    """Write `runs.csv` (one row per seed run) and `runs.jsonl` (rows with curves and probes)."""
    results = store.results()
    write_runs_csv(results, folder / "runs.csv")
    _atomic_write(folder / "runs.jsonl", "".join(line + "\n" for line in iter_json_lines(results)))
    return results


# --------------------------------------------------------------------------- one worker

def work(store: SweepStore, cfg: SweepFile, *, progress: Callable[[int], None] | None = None,
         idle_wait_s: float = 2.0) -> int:
    """Claim and train cells until none is waiting or running; return how many this worker stored.

    A cell held by a worker that died is failed once its heartbeat goes stale and
    comes back as waiting, so this loop waits while others still run.
    """
    from .datasets import load_dataset
    from .train import train_cell

    data = load_dataset(cfg.data)
    done = 0
    while True:
        claim = store.claim()
        if claim is None:
            store.reap_stale()
            counts = store.counts()
            if counts["waiting"]:
                continue
            if not counts["running"]:
                return done
            time.sleep(idle_wait_s)
            continue
        log.info("training cell %s", claim.spec.cell_id)
        try:
            with Heartbeat(store, claim.trial_id):
                results = train_cell(claim.spec, cfg.model, cfg.train, cfg.probes, data, progress=progress)
        except KeyboardInterrupt:
            store.release(claim, "interrupted")
            raise
        except Exception:
            store.release(claim, traceback.format_exc())
            raise
        if store.record(claim, results):
            done += 1


def _worker_process(cfg_dict: dict, url: str, name: str, queue: Any) -> None:
    import torch

    torch.set_num_threads(1)
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    cfg = config_from_dict(cfg_dict)
    store = SweepStore(url, name)
    try:
        work(store, cfg, progress=queue.put)
    except KeyboardInterrupt:
        pass


# --------------------------------------------------------------------------- the whole sweep

@dataclass(frozen=True)
class SweepSummary:
    folder: Path
    n_cells: int
    n_trained: int
    n_runs: int
    wall_seconds: float
    by_status: dict[str, int]


def run_sweep(cfg: SweepFile, *, out: str | Path | None = None, workers: int = 1,
              storage: str | None = None, show_progress: bool = True) -> SweepSummary:
    """Train every cell of the sweep that is not stored yet, and export the runs.

    Args:
        cfg: the checked sweep file.
        out: output folder (default `output.dir` or `results/<name>`).
        workers: local worker processes (1: train in this process).
        storage: storage URL (default `$DEPTHPLAN_STORAGE`, `output.storage`, or SQLite in the folder).
        show_progress: draw a progress bar on stderr.

    Raises:
        StoreError: the folder holds a different sweep, or is in use.
        Interrupted: Ctrl-C; finished cells stay stored and a rerun does the rest.
    """
    if workers < 1:
        raise ConfigError(f"--workers: must be a positive integer, got {workers}")
    folder = output_folder(cfg, out)
    folder.mkdir(parents=True, exist_ok=True)
    url = resolve_url(storage, cfg.output.storage, folder)
    t0 = time.perf_counter()
    with FolderLock(folder / ".lock"):
        store = open_sweep(cfg, folder, url)
        write_sidecars(cfg, folder, store)
        cells = plan_cells(cfg)
        store.plan(cells)
        store.reap_stale()
        stored = {r.cell_id for r in store.results()}
        todo = [c for c in cells if c.cell_id not in stored]
        total = sum(len(c.seeds) for c in todo) * cfg.train.max_updates
        bar = _progress_bar(total, show_progress, f"{cfg.name}: {len(todo)} of {len(cells)} cells to train")
        try:
            if workers == 1:
                import torch

                torch.set_num_threads(max(1, min(2, os.cpu_count() or 1)))
                n_trained = work(store, cfg, progress=bar.update)
            else:
                n_trained = _run_processes(cfg, store, workers, bar)
        except KeyboardInterrupt:
            bar.close()
            results = export_runs(store, folder)
            raise Interrupted(f"interrupted: {len({r.cell_id for r in results})} of {len(cells)} cells are stored "
                              f"in {folder}; run the same command again to finish the rest") from None
        bar.close()
        results = export_runs(store, folder)
    missing = len(cells) - len({r.cell_id for r in results})
    if missing:
        raise RunFailed(f"{missing} of {len(cells)} cells did not finish (see the log above); "
                        "run the same command again to retry them")
    by_status: dict[str, int] = {}
    for r in results:
        by_status[r.status] = by_status.get(r.status, 0) + 1
    return SweepSummary(folder, len(cells), n_trained, len(results), time.perf_counter() - t0, by_status)


def _run_processes(cfg: SweepFile, store: SweepStore, workers: int, bar: Any) -> int:
    ctx = mp.get_context("spawn")
    queue = ctx.Queue()
    before = len(store.completed_cells())
    procs = [ctx.Process(target=_worker_process, args=(cfg.to_dict(), store.url, store.name, queue),
                         daemon=True)
             for _ in range(workers)]
    for p in procs:
        p.start()
    try:
        while any(p.is_alive() for p in procs) or not queue.empty():
            try:
                bar.update(queue.get(timeout=0.5))
            except Exception:  # queue.Empty: nothing reported in the last half second
                pass
    except KeyboardInterrupt:
        for p in procs:
            p.join(timeout=30)
        raise
    for p in procs:
        p.join()
    bad = [p.exitcode for p in procs if p.exitcode]
    if bad:
        log.warning("%d worker process(es) exited with status %s", len(bad), bad)
    return len(store.completed_cells()) - before


class _NoBar:
    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def _progress_bar(total: int, show: bool, desc: str) -> Any:
    if not show or total == 0:
        return _NoBar()
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit=" seed-updates", unit_scale=True, dynamic_ncols=True,
                mininterval=0.5, smoothing=0.05)


def machine_facts() -> dict[str, Any]:
    """What the results were measured on (for provenance)."""
    return {"python": platform.python_version(), "platform": platform.platform(),
            "processor": platform.processor() or platform.machine(), "cpus": os.cpu_count()}
