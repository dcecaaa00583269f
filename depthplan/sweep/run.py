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
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Callable

from ..config import SweepFile, config_from_dict, dump_config
from ..errors import ConfigError, DepthplanError, RunFailed, StoreError, first_line
from ..forked import available_cores
from ..records import (
    CellSpec,
    RunResult,
    group_runs,
    primary_group,
    write_csv,
    write_runs_csv,
    write_runs_jsonl,
    write_text_atomic,
)
from ..urls import redact
from .sizes import (
    PREDICTION_KEY,
    all_sizes,
    at_sizes,
    check_sizes,
    same_size,
    sized_inputs,
    stamp_rows,
    sweep_facts,
    swept_sizes,
)
from . import guards
from .storage import (
    Heartbeat,
    SweepStore,
    check_url,
    local_url,
    resolve_url,
    store_failures,
    study_names,
    tuning_storage,
)

log = logging.getLogger(__name__)


class Interrupted(DepthplanError):
    """The user stopped the sweep; what was stored stays stored."""

    exit_code = 130


def _initial_state(cfg: SweepFile) -> dict[str, Any]:
    """The schedule before any round: the sweep file's depths and seeds, no tuned rates."""
    return {"seeds": {str(k): list(cfg.sweep.seeds) for k in cfg.sweep.depths}, "tuned": {}, "rounds": []}


def plan_cells(cfg: SweepFile, state: dict[str, Any] | None = None, *,
               sizes: list[tuple[int, int]] | None = None) -> list[CellSpec]:
    """Every (learning rate, depth, seed block) cell of the sweep, shallow depths first.

    Args:
        cfg: the sweep file.
        state: the stored schedule (seeds per depth, tuned rates per depth); default: the
            sweep file's own depths and seeds, no tuned rates yet.
        sizes: the proxy sizes (width, rows) to plan; default the swept ones (`sizes.swept_sizes`).
    """
    state = state or _initial_state(cfg)
    cells = []

    def blocks(depth: int, lr: float, mode: str) -> None:
        seeds = state["seeds"][str(depth)]
        block = cfg.sweep.seeds_per_cell or len(cfg.sweep.seeds)
        for i in range(0, len(seeds), block):
            cells.append(CellSpec(depth=depth, seeds=tuple(seeds[i:i + block]), learning_rate=lr, lr_mode=mode))

    depths = sorted(int(k) for k in state["seeds"])
    for lr in cfg.train.learning_rate:
        for depth in depths:
            blocks(depth, lr, "fixed")
    for depth in depths:
        if str(depth) in state["tuned"]:
            blocks(depth, float(state["tuned"][str(depth)]), "tuned")
    return at_sizes(cells, swept_sizes(cfg) if sizes is None else sizes)


def check_sweep_model(cfg: SweepFile) -> None:
    """Build the sweep's network at its shallowest and deepest depth (`families.check_model`), or raise."""
    from ..train.datasets import load_dataset
    from ..train.functional import check_model

    deepest = cfg.sweep.adaptive.high if cfg.sweep.adaptive else max(cfg.sweep.depths)
    check_model(cfg.model, load_dataset(cfg.data), (min(cfg.sweep.depths), deepest))


def output_folder(cfg: SweepFile, out: str | Path | None) -> Path:
    """Where results go: --out, then output.dir (by default results/<name> beside the sweep file)."""
    return Path(out or cfg.output.dir or Path("results") / cfg.name).expanduser().resolve()


def make_folder(folder: Path) -> None:
    """Create the results folder, or say in one line why it cannot be one.

    Raises:
        ConfigError: the path (or a parent) is a file.
    """
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except (FileExistsError, NotADirectoryError):
        raise ConfigError(f"results folder {folder}: is a file (or lies under one), not a folder; "
                          "pass --out DIR naming a folder") from None


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


def open_sweep(cfg: SweepFile, folder: Path, url: str, *, over_sample: bool = False) -> SweepStore:
    """Open (or create) the sweep's store and check it holds this very sweep.

    Args:
        over_sample: exports without a store may be trained over (the demo's committed sample,
            which ships without its store); otherwise that is refused.

    Raises:
        StoreError: the store holds a sweep of another config.
    """
    own_store = url == local_url(folder)
    if own_store and not over_sample:
        guards.check_store_beside_exports(folder, folder / "store.db")
    guards.check_one_sweep(folder, cfg.name, study_names(url) if own_store else None)
    hashes = guards.data_hashes(cfg)
    store = SweepStore(url, cfg.name, create=True)
    meta = store.meta()
    if "fingerprint" not in meta:
        store.set_meta("fingerprint", cfg.fingerprint())
        store.set_meta("config", cfg.to_dict())
        store.set_meta("data_sha256", hashes)
        store.set_meta("created", time.strftime("%Y-%m-%dT%H:%M:%S%z"))
        return store
    if meta.get("data_sha256") is None:   # a store made before data files were fingerprinted
        if hashes:
            log.warning("%s: the sweep was stored before data files were fingerprinted; its data is taken "
                        "as unchanged and fingerprinted now", folder)
        store.set_meta("data_sha256", hashes)
    guards.check_data(meta.get("data_sha256"), hashes, str(folder))
    if meta["fingerprint"] != cfg.fingerprint():
        changed = _differences({k: v for k, v in meta.get("config", {}).items() if k not in ("output", "name")},
                               {k: v for k, v in cfg.to_dict().items() if k not in ("output", "name")})
        what = f" (changed: {', '.join(changed[:5])})" if changed else ""
        raise StoreError(f"{folder} already holds sweep '{cfg.name}' run with a different config{what}; "
                         "pass --out DIR to run the changed sweep in a new folder, or restore the old settings to finish this one")
    return store


def check_worker_data(store: SweepStore, cfg: SweepFile) -> None:
    """A worker refuses a sweep whose data files here differ from those it was planned with."""
    guards.check_data(store.meta().get("data_sha256"), guards.data_hashes(cfg), f"sweep '{store.name}'")


def write_sidecars(cfg: SweepFile, folder: Path, store: SweepStore, state: dict[str, Any] | None = None) -> None:
    """The resolved config and sweep facts beside the results (so every number traces to its settings).

    `sweep.json` also carries the schedule when one is given: the depths and seeds
    swept, tuned rates per depth, and each adaptive round with its reason.
    """
    write_text_atomic(folder / "config.yaml", dump_config(cfg))
    state = state or _initial_state(cfg)
    info = {"name": cfg.name, "fingerprint": cfg.fingerprint(),
            "data_sha256": store.meta().get("data_sha256", {}), "storage": redact(store.url),
            "eval_every": cfg.train.eval_every, "max_updates": cfg.train.max_updates,
            "depths": sorted(int(k) for k in state["seeds"]), "seeds": list(cfg.sweep.seeds),
            "seeds_per_depth": {k: len(v) for k, v in state["seeds"].items()},
            "learning_rates": list(cfg.train.learning_rate),
            "tuned_rates": state["tuned"], "rounds": state["rounds"],
            "early_censor": cfg.sweep.early_censor, "config_file": cfg.source_path,
            "machine": machine_facts()}
    info.update(sweep_facts(cfg, store.meta()))     # proxy sizes, held-out size, target (when set)
    write_text_atomic(folder / "sweep.json", json.dumps(info, indent=2) + "\n")


def export_runs(store: SweepStore, folder: Path) -> list[RunResult]:
    """Write `runs.csv` (one row per seed run) and `runs.jsonl` (rows with curves and probes)."""
    results = store.results()
    write_runs_csv(results, folder / "runs.csv")
    write_runs_jsonl(results, folder / "runs.jsonl")
    return results


# --------------------------------------------------------------------------- one worker

def work(store: SweepStore, cfg: SweepFile, *, progress: Callable[[int], None] | None = None,
         idle_wait_s: float = 2.0, linger_s: float = 0.0, keep_going: Callable[[], bool] | None = None,
         nap: Callable[[float], None] = time.sleep) -> int:
    """Claim and train cells until none is waiting or running; return how many this worker stored.

    A cell whose training raises is logged and stored as failed (see `SweepStore.fail`),
    and the loop carries on with the other cells; a bad input (`ConfigError`) or an
    interruption gives the cell back and stops the loop. A cell held by a worker
    that died is failed once its heartbeat goes stale and comes back as waiting,
    so this loop waits while others still run. With
    `linger_s`, an idle worker waits that long for newly planned cells (the next
    round of an adaptive sweep) before it stops. With `keep_going`, the loop stops between
    cells once it answers False (a local worker whose `run` was killed). An idle worker
    waits with `nap(idle_wait_s)`, which may return early (when new cells are planned).
    """
    from ..train.datasets import load_dataset
    from ..train.loop import train_cell
    from .schedule import early_budget

    data = load_dataset(cfg.data)
    # longest expected first, so the last cell does not run alone; with early censoring the
    # shallow cells go first, as the budgets of the others come from their medians
    cost = None if cfg.sweep.early_censor is not None else (lambda spec: guards.expected_cost(cfg, spec))
    done = 0
    idle_since = None
    while keep_going is None or keep_going():
        claim = store.claim(cost)
        if claim is None:
            store.reap_stale()
            waiting, running = store.pending()
            if waiting:
                continue
            if not running:
                idle_since = idle_since or time.monotonic()
                if time.monotonic() - idle_since >= linger_s:
                    return done
            nap(idle_wait_s)
            continue
        idle_since = None
        spec = claim.spec
        if cfg.sweep.early_censor is not None:
            spec = replace(spec, stop_after=early_budget(same_size(store.results(), spec), spec, cfg.sweep.early_censor,
                                                         cfg.train.max_updates))
        log.info("training cell %s%s", spec.cell_id, f" (stops at {spec.stop_after})" if spec.stop_after else "")
        try:
            with Heartbeat(store, claim.trial_id):
                model, cell_data = sized_inputs(spec, cfg, data)
                results = stamp_rows(spec, train_cell(spec, model, cfg.train, cfg.probes, cell_data, progress=progress))
        except KeyboardInterrupt:
            store.release(claim, "interrupted")
            raise
        except ConfigError:
            store.release(claim, traceback.format_exc())
            raise
        except Exception as exc:
            error = f"{type(exc).__name__}: {exc}" if str(exc).strip() else type(exc).__name__
            log.exception("cell %s failed: %s", spec.cell_id, first_line(error))   # with its traceback
            store.fail(claim, error, traceback.format_exc())
            continue
        if store.record(claim, results):
            done += 1
    return done


def _worker_process(cfg_dict: dict, url: str, name: str, queue: Any, round_no: Any, parent: int) -> None:
    """One local worker of a `_Pool`: it trains what is planned, round after round, until told to stop."""
    import torch

    torch.set_num_threads(1)
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    cfg = config_from_dict(cfg_dict)
    store = SweepStore(url, name)

    def keep_going() -> bool:
        # a worker whose `run` was killed finishes (and stores) its cell, then stops
        return os.getppid() == parent and round_no.value >= 0

    def nap(seconds: float) -> None:
        # idle: wake as soon as the parent plans the next round (or stops the pool), not a poll later
        seen, until = round_no.value, time.monotonic() + seconds
        while time.monotonic() < until and round_no.value == seen and keep_going():
            time.sleep(0.05)

    try:
        work(store, cfg, progress=queue.put, keep_going=keep_going, nap=nap, linger_s=float("inf"))
    except KeyboardInterrupt:
        return
    # stopped cleanly, every cell it trained committed: hand over the last progress counts and
    # leave without the interpreter's teardown of torch (about 0.5 s here, spent while `run` waits)
    store.storage.engine.dispose()          # close database connections properly (a server sees a goodbye)
    queue.close()
    queue.join_thread()
    logging.shutdown()
    os._exit(0)


class _Pool:
    """Local worker processes that live across the rounds of one `run`.

    Started when the first round has cells to train and kept until the sweep ends,
    so the held-out round and adaptive rounds do not wait for fresh processes (each
    re-imports torch, about 4 s here) and no worker idles out a poll between rounds.
    """

    def __init__(self, cfg: SweepFile, store: SweepStore, workers: int) -> None:
        self.cfg, self.store, self.workers = cfg, store, workers
        self.procs: list[Any] = []

    def _start(self, n: int) -> None:
        ctx = mp.get_context("spawn")
        self.queue = ctx.Queue()
        self.round_no = ctx.Value("i", 0)
        self.procs = [ctx.Process(target=_worker_process, daemon=True,
                                  args=(self.cfg.to_dict(), self.store.url, self.store.name, self.queue,
                                        self.round_no, os.getpid()))
                      for _ in range(n)]
        for p in self.procs:
            p.start()

    def train(self, bar: Any, n_cells: int) -> int:
        """Train the planned cells; return how many were stored once none waits or runs."""
        before = len(self.store.completed_cells())
        if not any(p.is_alive() for p in self.procs):     # first round, or every worker died
            self.close()
            self._start(min(self.workers, n_cells))
        else:
            with self.round_no.get_lock():
                self.round_no.value += 1            # wakes idle workers at once
        try:
            next_check = time.monotonic() + 1.0
            while any(p.is_alive() for p in self.procs):
                try:
                    bar.update(self.queue.get(timeout=0.25))
                except Exception:  # queue.Empty: nothing reported in the last quarter second
                    pass
                if time.monotonic() >= next_check:
                    next_check = time.monotonic() + 0.5
                    if self.store.pending() == (0, 0):
                        break
        except KeyboardInterrupt:
            for p in self.procs:
                p.join(timeout=30)
            raise
        self._drain(bar)
        return len(self.store.completed_cells()) - before

    def _drain(self, bar: Any) -> None:
        while True:
            try:
                bar.update(self.queue.get_nowait())
            except Exception:  # queue.Empty
                return

    def close(self) -> None:
        """Stop the workers (idle by now) and report any that exited badly."""
        if not self.procs:
            return
        with self.round_no.get_lock():
            self.round_no.value = -1
        for p in self.procs:
            p.join(timeout=10)
            if p.is_alive():
                p.terminate()
                p.join()
        bad = [p.exitcode for p in self.procs if p.exitcode]
        if bad:
            log.warning("%d worker process(es) exited with status %s", len(bad), bad)
        self.procs = []


# --------------------------------------------------------------------------- the whole sweep

@dataclass(frozen=True)
class FailedCell:
    """A cell whose training raised: stored as failed, retried by the next run of the sweep."""

    depth: int
    learning_rate: float
    lr_mode: str
    error: str                                                # the error's first line

    def __str__(self) -> str:
        return f"depth {self.depth}, learning rate {self.learning_rate:g} ({self.lr_mode}): {self.error}"


def failed_cells(store: SweepStore, cells: list[CellSpec] | None = None) -> list[FailedCell]:
    """The failed cells of the store (of `cells` only, when given), by learning rate and depth."""
    ids = None if cells is None else {c.cell_id for c in cells}
    out = [FailedCell(spec.depth, spec.learning_rate, spec.lr_mode, first_line(error))
           for spec, error in store.failures() if ids is None or spec.cell_id in ids]
    return sorted(out, key=lambda f: (f.lr_mode, f.learning_rate, f.depth))


@dataclass(frozen=True)
class SweepSummary:
    folder: Path
    n_cells: int
    n_trained: int
    n_runs: int
    wall_seconds: float
    by_status: dict[str, int]
    rounds: list[dict] = field(default_factory=list)          # adaptive rounds and their reasons
    tuned_rates: dict[int, float] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)            # early-censoring saving, rates at the edge
    failed: list[FailedCell] = field(default_factory=list)    # cells whose training raised

    @property
    def n_failed(self) -> int:
        return len(self.failed)


def _train_round(cfg: SweepFile, store: SweepStore, cells: list[CellSpec], pool: _Pool | None,
                 show_progress: bool, label: str, retry_failed: bool) -> int:
    store.reclaim_dead_local()
    store.plan(cells, retry_failed=retry_failed)
    store.reap_stale()
    stored = {r.cell_id for r in store.results()}
    if not retry_failed:
        stored |= {spec.cell_id for spec, _ in store.failures()}
    todo = [c for c in cells if c.cell_id not in stored]
    total = sum(len(c.seeds) for c in todo) * cfg.train.max_updates
    bar = _progress_bar(total, show_progress, f"{label}: {len(todo)} of {len(cells)} cells to train")
    try:
        if pool is None or len(todo) <= 1 and not pool.procs:
            return work(store, cfg, progress=bar.update)
        return pool.train(bar, len(todo))
    finally:
        bar.close()


def _tune_rates(cfg: SweepFile, store: SweepStore, state: dict[str, Any], workers: int, show: bool) -> None:
    from .schedule import tune_depth

    depths = [int(k) for k in state["seeds"] if k not in state["tuned"]]
    if not depths:
        return
    bar = _progress_bar(len(depths), show, f"{cfg.name}: tuning the learning rate at {len(depths)} depths",
                        unit=" depths")
    if workers == 1:
        for depth in depths:
            state["tuned"][str(depth)] = tune_depth(cfg, tuning_storage(store.url), depth)
            store.set_meta("schedule", state)
            bar.update(1)
    else:
        ctx = mp.get_context("spawn")
        with ctx.Pool(workers) as pool:
            jobs = {d: pool.apply_async(_tune_process, (cfg.to_dict(), store.url, d)) for d in depths}
            for depth, job in jobs.items():
                state["tuned"][str(depth)] = job.get()
                store.set_meta("schedule", state)
                bar.update(1)
    bar.close()


def _tune_process(cfg_dict: dict, url: str, depth: int) -> float:
    import torch

    from .schedule import tune_depth
    torch.set_num_threads(1)
    return tune_depth(config_from_dict(cfg_dict), tuning_storage(url), depth)


def _next_round(cfg: SweepFile, store: SweepStore, state: dict[str, Any]) -> bool:
    """Fit what is stored, record the adaptive decision in `state`, and return whether to stop."""
    from .schedule import decide

    results = store.results()
    groups = group_runs(results)
    primary = groups[primary_group(groups)] if groups else []
    d = decide(primary, cfg.sweep.adaptive, round_no=len(state["rounds"]) + 1,
               cpu_seconds=sum(r.wall_seconds for r in results))
    log.warning("%s", d.reason)
    state["rounds"].append(d.to_dict())
    if not d.stop:
        for k in d.add_depths:
            state["seeds"].setdefault(str(k), list(cfg.sweep.seeds))
        for k, n in d.add_seeds.items():
            have = state["seeds"][str(k)]
            have += list(range(max(have) + 1, max(have) + 1 + n))
    store.set_meta("schedule", state)
    return d.stop


def _run_rounds(cfg: SweepFile, store: SweepStore, state: dict[str, Any], workers: int, pool: _Pool | None,
                show_progress: bool, plan_only: bool) -> int:
    """Tune, plan and train round after round until the schedule stops; return the cells trained."""
    n_trained = 0
    first_round = True
    while True:
        if cfg.train.tune is not None:
            _tune_rates(cfg, store, state, workers, show_progress)
        cells = plan_cells(cfg, state)
        if plan_only:
            store.plan(cells)
            return n_trained
        label = cfg.name if not state["rounds"] else f"{cfg.name} round {len(state['rounds']) + 1}"
        # failed cells are retried by the first round of a command, not by its later rounds
        n_trained += _train_round(cfg, store, cells, pool, show_progress, label, retry_failed=first_round)
        first_round = False
        if cfg.sweep.adaptive is None or (state["rounds"] and state["rounds"][-1]["stop"]):
            return n_trained
        if _next_round(cfg, store, state):
            return n_trained


def _write_outputs(cfg: SweepFile, folder: Path, store: SweepStore, state: dict[str, Any]) -> list[RunResult]:
    """Export the runs, rewrite the sidecars with the schedule, and write `tuning.csv` when tuned."""
    from .schedule import tuning_trials

    results = export_runs(store, folder)
    write_sidecars(cfg, folder, store, state)
    if cfg.train.tune is not None:
        rows = tuning_trials(tuning_storage(store.url), cfg.name, sorted(int(k) for k in state["seeds"]))
        write_csv(folder / "tuning.csv", rows, ("depth", "trial", "learning_rate", "objective", "statuses"))
    return results


def _check_finished(cells: list[CellSpec], results: list[RunResult], failed: list[FailedCell]) -> None:
    """Raise `RunFailed` when some planned cells are neither stored nor failed."""
    missing = len(cells) - len({r.cell_id for r in results} & {c.cell_id for c in cells}) - len(failed)
    if missing:
        also = f" and {len(failed)} failed" if failed else ""
        raise RunFailed(f"{missing} of {len(cells)} cells did not finish{also} (see the log above); "
                        "run the same command again to retry them")


def _status_counts(results: list[RunResult]) -> dict[str, int]:
    """How many runs ended with each status."""
    by_status: dict[str, int] = {}
    for r in results:
        by_status[r.status] = by_status.get(r.status, 0) + 1
    return by_status


def _summary_notes(cfg: SweepFile, results: list[RunResult], tuned: dict[int, float]) -> list[str]:
    """The summary's notes: what early censoring saved, and tuned rates at the edge of their range."""
    from .schedule import early_censor_saving, rate_at_edge

    notes = []
    n_early, saved = early_censor_saving(results, cfg.train.max_updates)
    if cfg.sweep.early_censor is not None:
        budget = len(results) * cfg.train.max_updates
        notes.append(f"early censoring stopped {n_early} runs at {cfg.sweep.early_censor:g}x the best median T "
                     f"so far, saving {saved} of at most {budget} seed-updates ({100 * saved / max(1, budget):.0f} %)")
    if cfg.train.tune is not None:
        edge = sorted(k for k, lr in tuned.items() if rate_at_edge(lr, cfg.train.tune))
        if edge:
            notes.append(f"the tuned rate sits at the edge of its range [{cfg.train.tune.low:g}, "
                         f"{cfg.train.tune.high:g}] at depths {edge}: widen the range and rerun in a new folder")
    return notes


def run_sweep(cfg: SweepFile, *, out: str | Path | None = None, workers: int | None = 1,
              storage: str | None = None, show_progress: bool = True, plan_only: bool = False,
              over_sample: bool = False) -> SweepSummary:
    """Train every cell of the sweep that is not stored yet, and export the runs.

    With a tuning block, each depth's learning rate is searched first; with
    adaptive depths, rounds of training and fitting follow until the policy
    stops. The schedule (seeds per depth, tuned rates, rounds and their
    reasons) is stored with the sweep, so a rerun continues where it stopped.

    Args:
        cfg: the checked sweep file.
        out: output folder (default `output.dir` or `results/<name>`).
        workers: local worker processes (1: train in this process; None: one per available core).
        storage: storage URL (default `$DEPTHPLAN_STORAGE`, `output.storage`, or SQLite in the folder).
        show_progress: draw a progress bar on stderr.
        plan_only: enqueue the (first round's) cells for `depthplan worker` processes and return.

    Raises:
        StoreError: the folder holds a different sweep, or is in use.
        Interrupted: Ctrl-C; finished cells stay stored and a rerun does the rest.
    """
    workers = available_cores() if workers is None else workers
    if workers < 1:
        raise ConfigError(f"--workers: must be a positive integer, got {workers}")
    guards.check_memory(cfg, plan_cells(cfg))
    if cfg.model.family_name != "mlp":   # a factory that cannot build its module fails here, before any training
        check_sweep_model(cfg)
    check_sizes(cfg)                      # row counts against the training split, before any folder or training
    folder = output_folder(cfg, out)
    url = resolve_url(storage, cfg.output.storage, folder)
    check_url(url)
    make_folder(folder)
    t0 = time.perf_counter()
    with FolderLock(folder / ".lock"), store_failures(url):
        store = open_sweep(cfg, folder, url, over_sample=over_sample)
        write_sidecars(cfg, folder, store)
        state = store.meta().get("schedule") or _initial_state(cfg)
        store.set_meta("schedule", state)
        if workers == 1:
            import torch

            torch.set_num_threads(1)   # a second thread never helped these small products, and hurts under load
        pool = _Pool(cfg, store, workers) if workers > 1 else None
        try:
            n_trained = _run_rounds(cfg, store, state, workers, pool, show_progress, plan_only)
            if cfg.sweep.verify is not None and not plan_only:
                n_trained += _verify_round(cfg, folder, store, state, pool, show_progress)
        except KeyboardInterrupt:
            results = export_runs(store, folder)
            raise Interrupted(f"interrupted: {len({r.cell_id for r in results})} cells are stored "
                              f"in {folder}; run the same command again to finish the rest") from None
        finally:
            if pool is not None:
                pool.close()
        results = _write_outputs(cfg, folder, store, state)
    predicted = PREDICTION_KEY in store.meta()
    cells = plan_cells(cfg, state, sizes=all_sizes(cfg) if predicted and not plan_only else None)
    failed = [] if plan_only else failed_cells(store, cells)
    if not plan_only:
        _check_finished(cells, results, failed)
    tuned = {int(k): float(v) for k, v in state["tuned"].items()}
    return SweepSummary(folder, len(cells), n_trained, len(results), time.perf_counter() - t0,
                        _status_counts(results), state["rounds"], tuned, _summary_notes(cfg, results, tuned), failed)


def _verify_round(cfg: SweepFile, folder: Path, store: SweepStore, state: dict[str, Any], pool: _Pool | None,
                  show_progress: bool) -> int:
    """Predict the held-out size from the stored swept sizes, store the prediction, then train it.

    The prediction is made once, when every swept cell is stored, and kept (a rerun never
    replaces it); until then the held-out size is not trained.
    """
    from .sizes import predict_held_out, verify_size

    swept = plan_cells(cfg, state)
    results = store.results()
    if not {c.cell_id for c in swept} <= {r.cell_id for r in results}:
        log.warning("%s: the held-out size waits until every swept cell is stored", cfg.name)
        return 0
    if PREDICTION_KEY not in store.meta():
        record = predict_held_out(cfg, results)
        store.set_meta(PREDICTION_KEY, record)
        write_sidecars(cfg, folder, store, state)          # the prediction is on disk before it trains
        log.info("%s: prediction for the held-out size stored before training it", cfg.name)
    cells = plan_cells(cfg, state, sizes=[verify_size(cfg)])
    return _train_round(cfg, store, cells, pool, show_progress, f"{cfg.name} held-out size", retry_failed=True)


class _NoBar:
    def update(self, n: int = 1) -> None:
        pass

    def close(self) -> None:
        pass


def _progress_bar(total: int, show: bool, desc: str, unit: str = " seed-updates") -> Any:
    if not show or total == 0:
        return _NoBar()
    from tqdm import tqdm

    class _Bar(tqdm):
        monitor_interval = 0     # no monitor thread: the report forks its helpers only with one thread alive

    return _Bar(total=total, desc=desc, unit=unit, unit_scale=True, dynamic_ncols=True,
                mininterval=0.5, smoothing=0.05)


def machine_facts() -> dict[str, Any]:
    """What the results were measured on (for provenance)."""
    return {"python": platform.python_version(), "platform": platform.platform(),
            "processor": platform.processor() or platform.machine(), "cpus": os.cpu_count()}
