"""One cell's training loop, shared by every family's trainer: blocks of updates, evaluation,
verdicts, seeds leaving the batch, the probe schedule, and the records built from what it logged.

The trainers (`loop.py` for the mlp family's hand-written maths, `functional.py` for the torch.func
families) differ only in how a stack of seeds is updated, evaluated and probed: each hands
`run_cell` an `Engine` with those operations, and the loop, the schedule and the `RunResult`
fields live here once.

Probe schedule (`probes.probe_grids`): the displacement at every step of the dense grid, the
gradient SNR and the information at the sparse grid's steps (`RunResult.snr_steps`), and every
seed that converges or is censored at its own last step T as well, right before it leaves.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Protocol

import numpy as np
import torch

from ..config import ProbeConfig, TrainConfig
from ..records import CellSpec, RunResult
from .batches import BatchStream
from .convergence import Criterion, verdict
from .probes import displacement, probe_grids

ProgressFn = Callable[[int], None]

#: One probe of one seed: (step, displacement per layer, SNR per layer or None,
#: (I(X;T), I(T;Y)) per layer or None). SNR and information are measured on the sparse grid only.
Probe = tuple[int, list[float], "list[float] | None", "list[tuple[float, float]] | None"]

#: What an engine's probe returns for the probed seeds: displacement per layer (n_probed,), SNR
#: per layer (n_probed,) or None, and per probed seed its (I(X;T), I(T;Y)) per layer or None.
ProbeValues = tuple[list[np.ndarray], "list[np.ndarray] | None", "list[list[tuple[float, float]]] | None"]


class Engine(Protocol):
    """A stack of seeds a trainer updates, evaluates and probes; rows are positions in the stack."""

    def minibatches(self, rows: np.ndarray) -> Iterable[Any]:
        """Each step's batch for every active seed, from row indices (n_active, n_steps, batch)."""

    def step(self, batch: Any) -> None:
        """One update of every active seed."""

    def evaluate(self, validation: bool) -> tuple[np.ndarray, np.ndarray]:
        """Mean loss and accuracy of every active seed on the evaluation rows (or the validation set)."""

    def validation(self, done: list[int], val_acc: np.ndarray) -> list[float]:
        """Validation accuracy of the seeds at stack rows `done` (`val_acc`: this block's, or NaN)."""

    def probe(self, rows: list[int], draws: np.ndarray | None, sparse: bool) -> ProbeValues:
        """Probe the seeds at stack rows `rows`; `draws` (n_probed, window, batch) are the SNR's rows."""

    def keep(self, rows: torch.Tensor) -> None:
        """Drop finished seeds: keep the given stack rows."""


@dataclass
class Schedule:
    """A cell's probe steps and the per-seed random draws of its SNR windows."""

    probes: ProbeConfig
    dense_at: set[int]
    sparse_at: set[int]
    rngs: list[np.random.Generator]
    n_rows: int

    @classmethod
    def build(cls, probes: ProbeConfig, budget: int, seeds: tuple[int, ...], n_rows: int) -> Schedule:
        dense, sparse = probe_grids(budget, probes.n_points) if probes.any else ([], [])
        dense_at = set(dense) if probes.displacement else set(sparse)
        rngs = [np.random.default_rng([int(s), 0x5A1]) for s in seeds]
        return cls(probes, dense_at, set(sparse), rngs, n_rows)

    def draws(self, rows: list[int], active: list[int], streams: list[BatchStream], sparse: bool) -> np.ndarray | None:
        """Each probed seed's SNR window of minibatch rows (n_probed, window, batch), from its own generator."""
        if not (sparse and self.probes.snr):
            return None
        return np.stack([self.rngs[active[k]].integers(0, self.n_rows, (self.probes.snr_window, streams[active[k]].batch))
                         for k in rows])


def layer_displacements(ws: list[torch.Tensor], w0: list[torch.Tensor]) -> list[np.ndarray]:
    """||W_t - W_0||_F per stacked weight tensor, one value per seed."""
    return [displacement(w.detach().numpy(), w_init.detach().numpy()) for w, w_init in zip(ws, w0)]


@dataclass
class CellLog:
    """What a cell's loop recorded, per seed (positions in `spec.seeds`)."""

    curves: list[list[tuple[int, float]]]
    probes: list[list[Probe]]
    seat_time: np.ndarray
    ended: dict[int, dict] = field(default_factory=dict)

    def walls(self, elapsed: float) -> list[float]:
        """Every seed's wall time: its seat time plus an even share of the cell's setup time."""
        setup = (elapsed - self.seat_time.sum()) / len(self.curves)
        return [float(s + setup) for s in self.seat_time]


def run_cell(engine: Engine, schedule: Schedule, streams: list[BatchStream], criterion: Criterion,
             budget: int, eval_every: int, has_validation: bool, progress: ProgressFn | None) -> CellLog:
    """Train every seed of a cell to its verdict (converged, censored, diverged), probing on `schedule`."""
    n_seeds = len(streams)
    active = list(range(n_seeds))                      # positions in the cell's seeds still training
    log = CellLog([[] for _ in range(n_seeds)], [[] for _ in range(n_seeds)], np.zeros(n_seeds))
    ended = log.ended
    step = 0

    def probe(rows: list[int], sparse: bool) -> None:
        disp, snr, info = engine.probe(rows, schedule.draws(rows, active, streams, sparse), sparse)
        for i, k in enumerate(rows):
            log.probes[active[k]].append((step, [float(d[i]) for d in disp],
                                          None if snr is None else [float(s[i]) for s in snr],
                                          None if info is None else info[i]))

    while active:
        t_block = time.perf_counter()
        n = min(eval_every - step % eval_every, budget - step)
        rows = np.stack([streams[a].take(n) for a in active])       # (n_active, n, batch)
        for batch in engine.minibatches(rows):
            if step in schedule.dense_at:
                probe(list(range(len(active))), sparse=step in schedule.sparse_at)
            engine.step(batch)
            step += 1
        loss, acc = engine.evaluate(validation=False)
        val_acc = np.full(len(active), math.nan)
        if criterion.needs_validation and has_validation:
            val_acc = engine.evaluate(validation=True)[1]
        done, keep = [], []
        for k, a in enumerate(active):
            log.curves[a].append((step, float(loss[k])))
            v = verdict(criterion, step, budget, float(loss[k]), float(acc[k]), float(val_acc[k]))
            (keep if v is None else done).append(k)
            if v is not None:
                ended[a] = {"status": v, "iterations": step, "loss": float(loss[k]), "acc": float(acc[k])}
        ending = [k for k in done if ended[active[k]]["status"] != "diverged"]
        if ending and schedule.dense_at:       # each seed's probes end at its own last step T
            probe(ending, sparse=True)
        log.seat_time[active] += (time.perf_counter() - t_block) / len(active)
        if done:
            if has_validation:
                for k, v in zip(done, engine.validation(done, val_acc)):
                    ended[active[k]]["val"] = v
            engine.keep(torch.tensor(keep, dtype=torch.long))         # finished seeds leave the batch
        if progress is not None:
            progress(n * len(active) + len(done) * (budget - step))
        active = [active[k] for k in keep]
    return log


def probe_fields(probes: ProbeConfig, plog: list[Probe], n_layers: int) -> dict:
    """One seed's probe series as `RunResult` fields: displacement at every probe step, SNR and
    information at the sparse ones (`snr_steps`)."""
    if not plog:
        return {}
    sparse = [p for p in plog if p[2] is not None or p[3] is not None]
    out: dict = {"probe_steps": tuple(p[0] for p in plog)}
    if probes.displacement:
        out["displacement"] = tuple(tuple(p[1][i] for p in plog) for i in range(n_layers))
    out["snr_steps"] = tuple(p[0] for p in sparse)
    if probes.snr:
        out["snr_db"] = tuple(tuple(p[2][i] for p in sparse) for i in range(n_layers))
    if probes.information:
        out["information_xt"] = tuple(tuple(p[3][i][0] for p in sparse) for i in range(n_layers))
        out["information_ty"] = tuple(tuple(p[3][i][1] for p in sparse) for i in range(n_layers))
    return out


def cell_results(spec: CellSpec, train: TrainConfig, probes: ProbeConfig, log: CellLog,
                 elapsed: float, n_layers: int, **network: Any) -> list[RunResult]:
    """Every seed's `RunResult` from what its cell logged; `network` holds the family's own fields
    (width, n_params, activation, init, family, extra, ...)."""
    out = []
    for a, (seed, wall) in enumerate(zip(spec.seeds, log.walls(elapsed))):
        end, curve = log.ended[a], log.curves[a]
        out.append(RunResult(
            depth=spec.depth, seed=seed, learning_rate=spec.learning_rate,
            status=end["status"], iterations=end["iterations"], wall_seconds=wall,
            seconds_per_update=wall / max(1, end["iterations"]),
            final_train_loss=end["loss"], final_train_accuracy=end["acc"],
            validation_accuracy=end.get("val", math.nan), optimizer=train.optimizer,
            lr_mode=spec.lr_mode, cell_id=spec.cell_id,
            eval_steps=tuple(s for s, _ in curve), train_loss=tuple(v for _, v in curve),
            **network, **probe_fields(probes, log.probes[a], n_layers)))
    return out
