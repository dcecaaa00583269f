"""The sweep store: planned cells as an Optuna study, one trial per cell.

A cell (the seeds of one depth and learning rate) is enqueued as a WAITING
trial carrying its `CellSpec` as a user attribute. Workers claim a cell by
moving its trial from WAITING to RUNNING, which the relational storage does
inside one row-locked transaction, so each claim succeeds exactly once. On
SQLite, which ignores `SELECT ... FOR UPDATE`, every transaction is opened
with `BEGIN IMMEDIATE` (one writer at a time) for the same guarantee. A worker
records a heartbeat while it trains; a trial whose heartbeat goes stale is
failed and re-enqueued (Optuna's `RetryHeartbeatStaleTrialCallback`). A
finished cell stores every seed's `RunResult` as a JSON attribute and becomes
COMPLETE in the same step that checks it is still the worker's, so a cell is
recorded at most once; results are read back once per cell id. A cell whose
training raised becomes FAIL with its error and traceback as user attributes;
it is not retried until the sweep is planned again (a rerun).

Never imports torch.
"""
from __future__ import annotations

import contextlib
import logging
import os
import socket
import threading
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator

from ..errors import ConfigError, RunFailed, StoreError
from ..urls import redact, scrub, split_url
from ..records import CellSpec, RunResult

log = logging.getLogger(__name__)

#: Environment variable that names the storage URL (keeps passwords out of files and logs).
STORAGE_ENV = "DEPTHPLAN_STORAGE"
#: Seconds between a worker's heartbeats, and of silence after which its cell is given to another.
HEARTBEAT_S = int(os.environ.get("DEPTHPLAN_HEARTBEAT_S", "5"))
GRACE_S = int(os.environ.get("DEPTHPLAN_GRACE_S", "20"))


def store_error(what: str, url: str, exc: BaseException) -> StoreError:
    """A StoreError for a driver/SQLAlchemy/Optuna failure: its first line, with no password in it."""
    text = str(exc).strip()
    first = text.splitlines()[0] if text else type(exc).__name__
    parts = split_url(url)
    hint = ""
    if parts and parts[1].count("@") > 1 and ":" in parts[1].rsplit("@", 1)[0]:
        hint = " (an '@' inside a password must be written %40)"
    elif "not a database" in first or "malformed" in first:
        hint = "; the store is damaged: restore it from a backup, or pass --out DIR to start a new sweep"
    return StoreError(scrub(f"{what} at {redact(url)}: {first}{hint}", url))


def is_db_failure(exc: BaseException) -> bool:
    """An error raised by the database layer under the sweep store (SQLAlchemy, Optuna, a driver)."""
    return type(exc).__module__.split(".")[0] in ("sqlalchemy", "optuna", "sqlite3", "psycopg2")


@contextlib.contextmanager
def store_failures(url: str) -> Iterator[None]:
    """Turn a database-layer failure while a sweep runs (disk full, folder made read-only, the
    server gone) into one `RunFailed` line naming the store; depthplan's own errors pass."""
    try:
        yield
    except Exception as exc:
        if not is_db_failure(exc):
            raise
        text = str(exc).strip()
        first = text.splitlines()[0] if text else type(exc).__name__
        raise RunFailed(scrub(f"the sweep store at {redact(url)} failed: {first}; check that its disk has "
                              "space and its folder is writable, then run the same command again "
                              "(finished cells stay stored)", url)) from None


def tuning_storage(url: str) -> Any:
    """Storage for learning-rate searches: the same database, no heartbeats (only `run` tunes)."""
    return open_rdb_storage(url, heartbeat=False)


def local_url(folder: Path) -> str:
    return f"sqlite:///{(Path(folder) / 'store.db').resolve()}"


def _quiet_optuna() -> Any:
    import optuna

    optuna.logging.set_verbosity(optuna.logging.WARNING)
    return optuna


def open_rdb_storage(url: str, *, heartbeat: bool = True) -> Any:
    """An Optuna RDBStorage (with heartbeats and retry unless told), safe as a queue on SQLite too."""
    optuna = _quiet_optuna()
    from optuna.exceptions import ExperimentalWarning

    kwargs: dict[str, Any] = {}
    if url.startswith("sqlite"):
        # let sqlite3 emit no BEGIN of its own; we open every transaction as BEGIN IMMEDIATE below
        kwargs["connect_args"] = {"isolation_level": None, "timeout": 120}
    else:
        kwargs["pool_pre_ping"] = True
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ExperimentalWarning)
        beats: dict[str, Any] = {}
        if heartbeat:
            beats = {"heartbeat_interval": HEARTBEAT_S, "grace_period": GRACE_S,
                     "heartbeat_stale_trial_callback": optuna.storages.RetryHeartbeatStaleTrialCallback()}
        storage = _open_racing_creators(lambda: optuna.storages.RDBStorage(url, engine_kwargs=kwargs, **beats), url)
    if url.startswith("sqlite"):
        from sqlalchemy import event

        @event.listens_for(storage.engine, "begin")
        def _begin_immediate(conn: Any) -> None:
            conn.exec_driver_sql("BEGIN IMMEDIATE")

        storage.engine.dispose()
    return storage


def _open_racing_creators(open_storage: Any, url: str, attempts: int = 6) -> Any:
    """Open the storage, retrying while another process is creating the same fresh schema.

    Two processes opening a new store at once (two workers, or a reader polling a
    sweep that has just started) both try to create Optuna's tables and stamp its
    schema version; the loser gets an integrity or "already exists"/"locked"
    error although the store is fine a moment later.
    """
    from sqlalchemy.exc import IntegrityError, OperationalError

    for attempt in range(attempts):
        try:
            return open_storage()
        except (IntegrityError, OperationalError) as exc:
            if attempt == attempts - 1:
                raise store_error("cannot open the sweep store", url, exc) from None
            time.sleep(0.2 * (attempt + 1))
        except Exception as exc:  # sqlalchemy/driver errors vary by backend
            raise store_error("cannot open the sweep store", url, exc) from None
    raise AssertionError("unreachable")


@dataclass
class Claim:
    """A cell this worker holds: train it, then `record` or `release` it."""

    trial_id: int
    number: int
    spec: CellSpec


class SweepStore:
    """Planned, running and finished cells of one sweep."""

    def __init__(self, url: str, study_name: str, *, create: bool = False) -> None:
        optuna = _quiet_optuna()
        self.url, self.name = url, study_name
        self.storage = open_rdb_storage(url)
        from sqlalchemy.exc import SQLAlchemyError

        try:
            if create:
                self.study = optuna.create_study(study_name=study_name, storage=self.storage,
                                                 load_if_exists=True, direction="minimize")
            else:
                try:
                    self.study = optuna.load_study(study_name=study_name, storage=self.storage)
                except KeyError:
                    names = [s.study_name for s in optuna.get_all_study_summaries(self.storage)]
                    hint = f" (studies there: {', '.join(names)})" if names else ""
                    raise StoreError(f"no sweep named '{study_name}' in {redact(url)}{hint}") from None
        except SQLAlchemyError as exc:
            raise store_error(f"cannot open sweep '{study_name}'", url, exc) from None
        self._id = self.study._study_id

    # ---------------------------------------------------------------- sweep metadata
    def meta(self) -> dict[str, Any]:
        return dict(self.study.user_attrs)

    def set_meta(self, key: str, value: Any) -> None:
        self.study.set_user_attr(key, value)

    # ---------------------------------------------------------------- planning
    def _trials(self, states: tuple | None = None) -> list[Any]:
        return self.storage.get_all_trials(self._id, deepcopy=False, states=states)

    def plan(self, cells: list[CellSpec], *, retry_failed: bool = True) -> int:
        """Enqueue every cell that is neither done, waiting nor running; return how many.

        A cell whose training raised (see `fail`) counts as not done, so it is enqueued
        again, unless `retry_failed` is False (later rounds of the same sweep command).
        """
        from optuna.trial import TrialState

        live = (TrialState.WAITING, TrialState.RUNNING, TrialState.COMPLETE)
        have = {t.user_attrs.get("cell_id") for t in self._trials(live)}
        if not retry_failed:
            have |= {spec.cell_id for spec, _ in self.failures()}
        added = 0
        for spec in cells:
            if spec.cell_id in have:
                continue
            self.study.enqueue_trial({"depth": spec.depth},
                                     user_attrs={"cell_id": spec.cell_id, "cell": spec.to_dict()})
            have.add(spec.cell_id)
            added += 1
        return added

    def counts(self) -> dict[str, int]:
        """Cells by state: waiting, running, complete, failed."""
        out = {"waiting": 0, "running": 0, "complete": 0, "failed": 0}
        for t in self._trials():
            key = t.state.name.lower()
            if key == "fail":
                key = "failed"
            if key in out:
                out[key] += 1
        return out

    def pending(self) -> tuple[int, int]:
        """(waiting, running) cells; cheap to poll, as finished cells and their runs are not read."""
        from optuna.trial import TrialState

        trials = self._trials((TrialState.WAITING, TrialState.RUNNING))
        running = sum(t.state == TrialState.RUNNING for t in trials)
        return len(trials) - running, running

    # ---------------------------------------------------------------- working
    def reap_stale(self) -> None:
        """Fail and re-enqueue cells whose worker stopped sending heartbeats."""
        import optuna
        from optuna.exceptions import ExperimentalWarning

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ExperimentalWarning)
            optuna.storages.fail_stale_trials(self.study)

    def claim(self, cost: Callable[[CellSpec], float] | None = None) -> Claim | None:
        """Take one waiting cell, or None when none is waiting.

        With `cost`, the waiting cell of the highest expected cost is taken first (so the
        longest cell does not start last and run alone); else the first planned.
        """
        from optuna.exceptions import UpdateFinishedTrialError
        from optuna.trial import TrialState

        waiting = self._trials((TrialState.WAITING,))
        if cost is not None:
            waiting = sorted(waiting, key=lambda t: -cost(CellSpec.from_dict(t.user_attrs["cell"])))
        for t in waiting:
            try:
                ok = self.storage.set_trial_state_values(t._trial_id, state=TrialState.RUNNING)
            except UpdateFinishedTrialError:
                ok = False
            if ok:
                self.storage.record_heartbeat(t._trial_id)
                # who holds the cell, for an operator looking at a stuck sweep
                self.storage.set_trial_system_attr(t._trial_id, "depthplan_worker",
                                                   f"{socket.gethostname()}:{os.getpid()}")
                return Claim(t._trial_id, t.number, CellSpec.from_dict(t.user_attrs["cell"]))
        return None

    def reclaim_dead_local(self) -> list[str]:
        """Give back at once the running cells held by processes of this machine that no longer exist.

        Only for an embedded (SQLite) store, which only this machine's processes open: a
        holder "host:pid" with this host name and a pid that is gone is certainly dead, so
        its cell need not wait out the heartbeat grace period. Returns the cells given back.
        """
        from optuna.trial import TrialState

        if not self.url.startswith("sqlite"):
            return []
        here = socket.gethostname()
        out = []
        for t in self._trials((TrialState.RUNNING,)):
            host, _, pid = str(t.system_attrs.get("depthplan_worker", "")).rpartition(":")
            if host != here or not pid.isdigit() or _alive(int(pid)):
                continue
            spec = CellSpec.from_dict(t.user_attrs["cell"])
            self.release(Claim(t._trial_id, t.number, spec), f"reclaimed: its worker {host}:{pid} is gone")
            log.info("reclaimed cell %s at once: its worker %s:%s is gone", spec.cell_id, host, pid)
            out.append(spec.cell_id)
        return out

    def record(self, claim: Claim, results: list[RunResult]) -> bool:
        """Store a finished cell; False if it was taken from us meanwhile (then it runs elsewhere)."""
        from optuna.exceptions import UpdateFinishedTrialError
        from optuna.trial import TrialState

        its = sorted(r.iterations for r in results)
        try:
            self.storage.set_trial_user_attr(claim.trial_id, "runs", [r.to_dict() for r in results])
            return bool(self.storage.set_trial_state_values(
                claim.trial_id, state=TrialState.COMPLETE, values=[float(its[len(its) // 2])]))
        except UpdateFinishedTrialError:
            log.warning("cell %s was failed by another worker meanwhile; its result is discarded", claim.spec.cell_id)
            return False

    def _set_failed(self, claim: Claim, attrs: dict[str, str], *, user: bool) -> bool:
        """Attach `attrs` to the claimed trial and make it FAIL; False if it was finished meanwhile."""
        from optuna.exceptions import UpdateFinishedTrialError
        from optuna.trial import TrialState

        set_attr = self.storage.set_trial_user_attr if user else self.storage.set_trial_system_attr
        try:
            for key, value in attrs.items():
                set_attr(claim.trial_id, key, value)
            return bool(self.storage.set_trial_state_values(claim.trial_id, state=TrialState.FAIL))
        except UpdateFinishedTrialError:
            return False

    def release(self, claim: Claim, reason: str) -> None:
        """Give a cell back after an interruption or a bad input: fail this trial, enqueue the cell again."""
        if self._set_failed(claim, {"depthplan_failure": reason[:2000]}, user=False):
            self.plan([claim.spec])

    def fail(self, claim: Claim, error: str, trace: str) -> bool:
        """Store a cell whose training raised as failed, with its error and traceback as user attributes.

        The cell is not enqueued again: the sweep carries on without it, and the next
        `plan` of the sweep (a rerun) retries it. False if the trial was finished meanwhile.
        """
        return self._set_failed(claim, {"error": error[:2000], "traceback": trace[-8000:]}, user=True)

    # ---------------------------------------------------------------- reading
    def results(self) -> list[RunResult]:
        """Every stored seed run, once per cell id (the first completed trial wins)."""
        from optuna.trial import TrialState

        seen: set[str] = set()
        out: list[RunResult] = []
        for t in sorted(self._trials((TrialState.COMPLETE,)), key=lambda t: t.number):
            cid = t.user_attrs.get("cell_id")
            if cid in seen or "runs" not in t.user_attrs:
                continue
            seen.add(cid)
            out.extend(RunResult.from_dict(d) for d in t.user_attrs["runs"])
        return out

    def failures(self) -> list[tuple[CellSpec, str]]:
        """(cell, error) of every cell not stored whose latest trial failed in training (see `fail`)."""
        from optuna.trial import TrialState

        latest: dict[str, Any] = {}
        stored: set[str] = set()
        for t in sorted(self._trials(), key=lambda t: t.number):
            cid = t.user_attrs.get("cell_id")
            latest[cid] = t
            if t.state == TrialState.COMPLETE:
                stored.add(cid)
        return [(CellSpec.from_dict(t.user_attrs["cell"]), t.user_attrs["error"]) for cid, t in latest.items()
                if cid not in stored and t.state == TrialState.FAIL and "error" in t.user_attrs]

    def holders(self) -> dict[str, str]:
        """Cell id -> "host:pid" of the worker holding it, for every running cell."""
        from optuna.trial import TrialState

        return {t.user_attrs.get("cell_id"): t.system_attrs.get("depthplan_worker", "")
                for t in self._trials((TrialState.RUNNING,))}

    def completed_cells(self) -> list[tuple[str, int]]:
        """(cell id, trial number) of every COMPLETE trial, duplicates included (for checks)."""
        from optuna.trial import TrialState

        return [(t.user_attrs.get("cell_id"), t.number) for t in self._trials((TrialState.COMPLETE,))]


def _alive(pid: int) -> bool:
    """Whether a process with this pid exists on this machine (a zombie counts as gone)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except (OSError, IndexError):
        return True


def study_names(url: str) -> list[str]:
    """Names of the studies (sweeps and their tuning searches) in a store."""
    optuna = _quiet_optuna()
    return [s.study_name for s in optuna.get_all_study_summaries(open_rdb_storage(url, heartbeat=False))]


def check_url(url: str) -> None:
    """Refuse a SQLite URL that names no database file (it would be a private in-memory store).

    Raises:
        ConfigError: naming the URL and what to write instead.
    """
    if url.startswith("sqlite"):
        path = url.split("://", 1)[1][1:] if "://" in url else ""
        if not path.split("?")[0] or path.split("?")[0] == ":memory:":
            raise ConfigError(f"storage {redact(url)}: names no database file; write sqlite:////absolute/path/store.db, "
                              "or leave the storage out for the results folder's own store")


class Heartbeat:
    """Background thread that keeps a claimed cell's heartbeat fresh while it trains."""

    def __init__(self, store: SweepStore, trial_id: int) -> None:
        self.store, self.trial_id = store, trial_id
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._beat, daemon=True)

    def _beat(self) -> None:
        while not self._stop.wait(HEARTBEAT_S):
            try:
                self.store.storage.record_heartbeat(self.trial_id)
            except Exception:  # a missed beat is retried; the grace period covers a few
                log.debug("heartbeat for trial %s failed", self.trial_id, exc_info=True)

    def __enter__(self) -> "Heartbeat":
        self._thread.start()
        return self

    def __exit__(self, *exc: Any) -> None:
        self._stop.set()
        self._thread.join()


def resolve_url(option: str | None, config_value: str | None, folder: Path) -> str:
    """Storage URL: --storage, then $DEPTHPLAN_STORAGE, then the config, then the local SQLite file."""
    return option or os.environ.get(STORAGE_ENV) or config_value or local_url(folder)
