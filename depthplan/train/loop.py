"""Train one cell (the seeds of one depth and learning rate) as one batched model.

The seeds' weights are stacked along a leading axis, (n_seeds, fan_in, fan_out),
and every update is a handful of batched matrix products with a hand-written
backward pass: no autograd graph and no per-seed Python loop, which is where a
CPU spends most of its time on networks this small. Each seed keeps its own
initial weights and its own minibatch order, so its trajectory equals what a
plain per-seed `nn.Sequential` + `torch.optim` loop computes (`reference.train_plain`,
for the tests and the benchmark). Seeds that finish leave the batch.
The batched maths (forward, backward, optimiser, evaluation) is in `stacked.py`.

What the speed comes from, measured on a 2-core CPU (benchmarks/trainer_speed.py):
plain SGD folds the gradient product into the update (`W.baddbmm_(h^T, g)`,
no gradient tensors); the activations' derivatives use autograd's own kernels
(`tanh_backward` and kin); the output layer is laid out class-major, because
torch's softmax and reductions along a short last axis are several times
slower; each evaluation block's minibatches are gathered by one index op; the
evaluation reuses two activation buffers (fresh multi-MB tensors cost their
page faults every time); training runs with one intra-op thread. `torch.compile`
of the step was measured too and left out: its kernels are the same MKL calls,
and each compiled call's Python wrapper cost more than it saved.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Callable

import numpy as np
import torch

from ..config import ModelConfig, ProbeConfig, TrainConfig
from ..errors import ConfigError
from ..records import CellSpec, RunResult
from .batches import BatchStream, _CellTensors, _cell_tensors, _eval_subset  # noqa: F401 (tests import them from here)
from .convergence import Criterion, verdict
from .datasets import Dataset
from .models import count_params, init_weights
from .probes import displacement, probe_grids
from .stacked import _evaluate, _gradient_snr, _information, _minibatches, _Optimizer, _Stack

ProgressFn = Callable[[int], None]



# --------------------------------------------------------------------------- one cell

def stacked_weights(model: ModelConfig, n_in: int, depth: int, n_out: int, seeds: tuple[int, ...],
                    dtype: torch.dtype) -> tuple[list[torch.Tensor], list[torch.Tensor]]:
    """Every seed's initial weights stacked: ws (n_seeds, fan_in, fan_out), bs (n_seeds, 1, fan_out)."""
    per_seed = [init_weights(model, n_in, model.widths(depth), n_out, s, dtype) for s in seeds]
    n_layers = len(per_seed[0])
    ws = [torch.stack([p[i][0].T for p in per_seed]).contiguous() for i in range(n_layers)]
    bs = [torch.stack([p[i][1] for p in per_seed]).unsqueeze(1).contiguous() for i in range(n_layers)]
    return ws, bs


def train_cell(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig,
               data: Dataset, *, progress: ProgressFn | None = None,
               dtype: torch.dtype = torch.float32, eval_rows: int | None = None,
               threads: int | None = 1) -> list[RunResult]:
    """Train every seed of `spec` to convergence, censoring or divergence.

    Args:
        spec: depth, seeds, learning rate (and an early-censoring budget) of the cell.
        model, train, probes: the matching sections of the sweep file.
        data: the task; the training loss is evaluated every `train.eval_every` updates.
        progress: called with seed-updates done (a finished seed's unused budget counts as done).
        dtype: float32 (default) or float64.
        eval_rows: evaluate the training loss and accuracy on a fixed subset of this many training
            rows (the same rows for every seed and every evaluation) when the set is larger;
            None: `train.eval_rows` if the config has it, else the full training set.
        threads: torch's intra-op threads while this cell trains (restored after); None leaves
            the setting alone. One is fastest: the operations are too small to share, and a
            second thread waiting on a core that another process holds slows training many times.

    Returns:
        One `RunResult` per seed, in the order of `spec.seeds`.
    """
    if eval_rows is None:
        eval_rows = getattr(train, "eval_rows", None)
    if eval_rows is not None and (isinstance(eval_rows, bool) or not isinstance(eval_rows, int) or eval_rows < 1):
        raise ConfigError(f"train.eval_rows: must be a positive integer or unset, got {eval_rows!r}")
    before = torch.get_num_threads()
    if threads is not None:
        torch.set_num_threads(threads)
    try:
        if model.family_name != "mlp":   # residual, conv, the user's module: the torch.func trainer
            from .functional import train_cell_functional
            return train_cell_functional(spec, model, train, probes, data, progress, dtype, eval_rows)
        with torch.inference_mode():
            return _train_cell(spec, model, train, probes, data, progress, dtype, eval_rows)
    finally:
        if threads is not None:
            torch.set_num_threads(before)


#: One probe of one seed: (step, displacement per layer, SNR per layer or None,
#: (I(X;T), I(T;Y)) per layer or None). SNR and information are measured on the sparse grid only.
Probe = tuple[int, list[float], "list[float] | None", "list[tuple[float, float]] | None"]


@dataclass
class _CellSetup:
    """A cell's trainable state: stacked weights, their initial copy, minibatch streams, optimiser, probes.

    `dense_at` holds the displacement's probe steps, `sparse_at` (a subset) those where the gradient
    SNR and the information are measured too; every seed is also probed at its own last step.
    """

    stack: _Stack
    w0: list[torch.Tensor]
    streams: list[BatchStream]
    opt: _Optimizer
    probe_rngs: list[np.random.Generator]
    dense_at: set[int]
    sparse_at: set[int]

    def probe(self, step: int, rows: list[int], active: list[int], t: _CellTensors, probes: ProbeConfig,
              act: str, probe_log: list[list[Probe]], *, sparse: bool) -> None:
        """Log the seeds at stack `rows` (positions `active[k]`): layer displacements, and with
        `sparse` their gradient SNR and information at `step`."""
        every = len(rows) == self.stack.n_seeds
        pick = None if every else torch.tensor(rows, dtype=torch.long)
        ws = self.stack.ws if every else [w.index_select(0, pick) for w in self.stack.ws]
        w0 = self.w0 if every else [w.index_select(0, pick) for w in self.w0]
        disp = [displacement(w.detach().numpy(), w_init.detach().numpy()) for w, w_init in zip(ws, w0)]
        sub = self.stack if every else _Stack(ws, [b.index_select(0, pick) for b in self.stack.bs])
        snr: list[np.ndarray] | None = None
        info: list[list[tuple[float, float]]] | None = None
        if sparse and probes.snr:
            n_rows = t.x.shape[0]
            draws = np.stack([self.probe_rngs[active[k]].integers(0, n_rows, (probes.snr_window,
                                                                               self.streams[active[k]].batch))
                              for k in rows])
            snr = _gradient_snr(sub, t.x, t.onehot, draws, act)
        if sparse and probes.information:
            info = _information(sub, t.x_info, t.y_info, act, probes.bins)
        for i, k in enumerate(rows):
            probe_log[active[k]].append((step, [float(d[i]) for d in disp],
                                         None if snr is None else [float(s[i]) for s in snr],
                                         None if info is None else info[i]))

    def keep(self, rows: torch.Tensor) -> None:
        """Drop finished seeds from the batch: keep the given rows of weights, state and initial weights."""
        self.opt.keep(rows)
        self.w0 = [w.index_select(0, rows) for w in self.w0]


def _cell_setup(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig, n_classes: int,
                x: torch.Tensor, budget: int, dtype: torch.dtype) -> _CellSetup:
    """Stack the seeds' initial weights and build their minibatch streams, optimiser and probe schedule."""
    n_rows, n_in = x.shape
    stack = _Stack(*stacked_weights(model, n_in, spec.depth, n_classes, spec.seeds, dtype))
    w0 = [w.clone() for w in stack.ws]
    streams = [BatchStream(s, n_rows, train.batch_size) for s in spec.seeds]
    opt = _Optimizer(train, spec.learning_rate, stack, streams[0].batch)
    probe_rngs = [np.random.default_rng([int(s), 0x5A1]) for s in spec.seeds]
    dense, sparse = probe_grids(budget, probes.n_points) if probes.any else ([], [])
    sparse_at = set(sparse)
    dense_at = set(dense) if probes.displacement else set(sparse)
    return _CellSetup(stack, w0, streams, opt, probe_rngs, dense_at, sparse_at)


def _validation_of(stack: _Stack, done: list[int], t: _CellTensors, act: str) -> list[float]:
    """Validation accuracy of the seeds at rows `done` of the stack."""
    rows_done = torch.tensor(done)
    finished = _Stack([w.index_select(0, rows_done) for w in stack.ws],
                      [b.index_select(0, rows_done) for b in stack.bs])
    return [float(v) for v in _evaluate(finished, t.x_val, t.y_val, act)[1]]


def _train_cell(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig, data: Dataset,
                progress: ProgressFn | None, dtype: torch.dtype, eval_rows: int | None) -> list[RunResult]:
    t_start = time.perf_counter()
    t = _cell_tensors(data, dtype, eval_rows)
    act = model.activation
    criterion = Criterion.from_config(train.converge_when)
    budget = min(train.max_updates, spec.stop_after or train.max_updates)
    seeds = spec.seeds
    cell = _cell_setup(spec, model, train, probes, data.n_classes, t.x, budget, dtype)

    active = list(range(len(seeds)))                   # positions in `seeds` still training
    curves: list[list[tuple[int, float]]] = [[] for _ in seeds]
    probe_log: list[list[Probe]] = [[] for _ in seeds]
    seat_time = np.zeros(len(seeds))
    ended: dict[int, dict] = {}
    step = 0

    while active:
        t_block = time.perf_counter()
        n = min(train.eval_every - step % train.eval_every, budget - step)
        rows = np.stack([cell.streams[a].take(n) for a in active])       # (n_active, n, batch)
        for xb, target in _minibatches(t.x, t.onehot, rows):
            if step in cell.dense_at:
                cell.probe(step, list(range(len(active))), active, t, probes, act, probe_log,
                           sparse=step in cell.sparse_at)
            cell.opt.step(xb, target, act)
            step += 1
        loss, acc = _evaluate(cell.stack, t.x_eval, t.y_eval, act)
        val_acc = np.full(len(active), math.nan)
        if criterion.needs_validation and len(t.y_val):
            val_acc = _evaluate(cell.stack, t.x_val, t.y_val, act)[1]
        done, keep = [], []
        for k, a in enumerate(active):
            curves[a].append((step, float(loss[k])))
            v = verdict(criterion, step, budget, float(loss[k]), float(acc[k]), float(val_acc[k]))
            (keep if v is None else done).append(k)
            if v is not None:
                ended[a] = {"status": v, "iterations": step, "loss": float(loss[k]), "acc": float(acc[k])}
        ending = [k for k in done if ended[active[k]]["status"] != "diverged"]
        if ending and cell.dense_at:       # each seed's probes end at its own last step T
            cell.probe(step, ending, active, t, probes, act, probe_log, sparse=True)
        seat_time[active] += (time.perf_counter() - t_block) / len(active)
        if done:
            if len(t.y_val):
                for k, v in zip(done, _validation_of(cell.stack, done, t, act)):
                    ended[active[k]]["val"] = v
            cell.keep(torch.tensor(keep, dtype=torch.long))         # finished seeds leave the batch
        if progress is not None:
            progress(n * len(active) + len(done) * (budget - step))
        active = [active[k] for k in keep]

    return _cell_results(spec, model, train, probes, data, ended, seat_time, time.perf_counter() - t_start,
                         curves, probe_log)


def _cell_results(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig, data: Dataset,
                  ended: dict[int, dict], seat_time: np.ndarray, elapsed: float,
                  curves: list[list[tuple[int, float]]], probe_log: list[list[Probe]]) -> list[RunResult]:
    """Every seed's `RunResult`, the cell's setup time (`elapsed` less the seats' time) shared evenly."""
    setup = (elapsed - seat_time.sum()) / len(spec.seeds)
    return [_result(spec, model, train, probes, data, seed, ended[a], float(seat_time[a] + setup),
                    curves[a], probe_log[a])
            for a, seed in enumerate(spec.seeds)]


def _probe_fields(probes: ProbeConfig, plog: list[Probe], n_layers: int) -> dict:
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


def _result(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig, data: Dataset,
            seed: int, end: dict, wall: float, curve: list[tuple[int, float]], plog: list[Probe]) -> RunResult:
    """One seed's `RunResult` from what its cell recorded."""
    widths = model.widths(spec.depth)
    n_layers = len(widths) + 1
    return RunResult(
        depth=spec.depth, width=widths[0], seed=seed, learning_rate=spec.learning_rate,
        status=end["status"], iterations=end["iterations"], wall_seconds=wall,
        seconds_per_update=wall / max(1, end["iterations"]),
        final_train_loss=end["loss"], final_train_accuracy=end["acc"],
        validation_accuracy=end.get("val", math.nan),
        n_params=count_params(data.n_features, widths, data.n_classes),
        activation=model.activation, init=model.init, optimizer=train.optimizer,
        lr_mode=spec.lr_mode, cell_id=spec.cell_id,
        # the network's shape, so that the fit can count the FLOPs of an update on any machine
        extra={"network": {"n_inputs": data.n_features, "n_classes": data.n_classes,
                           "widths": list(widths), "batch_size": train.batch_size}},
        eval_steps=tuple(s for s, _ in curve), train_loss=tuple(v for _, v in curve),
        **_probe_fields(probes, plog, n_layers),
    )
