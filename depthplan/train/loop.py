"""Train one cell (the seeds of one depth and learning rate) as one batched model.

The seeds' weights are stacked along a leading axis, (n_seeds, fan_in, fan_out),
and every update is a handful of batched matrix products with a hand-written
backward pass: no autograd graph and no per-seed Python loop, which is where a
CPU spends most of its time on networks this small. Each seed keeps its own
initial weights and its own minibatch order, so its trajectory equals what a
plain per-seed `nn.Sequential` + `torch.optim` loop computes (`reference.train_plain`,
for the tests and the benchmark). Seeds that finish leave the batch.
The batched maths (forward, backward, optimiser, evaluation) is in `stacked.py`; the per-cell loop,
probe schedule and records, shared with the other families' trainer, in `cell.py`.

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

import time

import numpy as np
import torch

from ..config import ModelConfig, ProbeConfig, TrainConfig
from ..errors import ConfigError
from ..records import CellSpec, RunResult
from .batches import BatchStream, CellTensors, cell_tensors
from .cell import ProbeValues, ProgressFn, Schedule, cell_results, layer_displacements, run_cell
from .convergence import Criterion
from .datasets import Dataset
from .models import count_params, init_weights
from .stacked import _evaluate, gradient_snr_db_by_layer, _information, _minibatches, _Optimizer, SeedStack


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


class _MlpEngine:
    """The mlp family's stacked seeds (`stacked.py`) as the `cell.Engine` that `cell.run_cell` drives."""

    def __init__(self, stack: SeedStack, opt: _Optimizer, t: CellTensors, act: str, probes: ProbeConfig) -> None:
        self.stack, self.opt, self.t, self.act, self.probes = stack, opt, t, act, probes
        self.w0 = [w.clone() for w in stack.ws]

    def minibatches(self, rows: np.ndarray):
        return _minibatches(self.t.x, self.t.onehot, rows)

    def step(self, batch: tuple[torch.Tensor, torch.Tensor]) -> None:
        self.opt.step(*batch, self.act)

    def evaluate(self, validation: bool) -> tuple[np.ndarray, np.ndarray]:
        if validation:
            return _evaluate(self.stack, self.t.x_val, self.t.y_val, self.act)
        return _evaluate(self.stack, self.t.x_eval, self.t.y_eval, self.act)

    def validation(self, done: list[int], val_acc: np.ndarray) -> list[float]:
        """Validation accuracy of the seeds at rows `done` of the stack."""
        rows_done = torch.tensor(done)
        finished = SeedStack([w.index_select(0, rows_done) for w in self.stack.ws],
                          [b.index_select(0, rows_done) for b in self.stack.bs])
        return [float(v) for v in _evaluate(finished, self.t.x_val, self.t.y_val, self.act)[1]]

    def probe(self, rows: list[int], draws: np.ndarray | None, sparse: bool) -> ProbeValues:
        """Layer displacements of the seeds at stack `rows`, and with `sparse` their gradient SNR and information."""
        every = len(rows) == self.stack.n_seeds
        pick = None if every else torch.tensor(rows, dtype=torch.long)
        ws = self.stack.ws if every else [w.index_select(0, pick) for w in self.stack.ws]
        w0 = self.w0 if every else [w.index_select(0, pick) for w in self.w0]
        sub = self.stack if every else SeedStack(ws, [b.index_select(0, pick) for b in self.stack.bs])
        snr = None if draws is None else gradient_snr_db_by_layer(sub, self.t.x, self.t.onehot, draws, self.act)
        info = None
        if sparse and self.probes.information:
            info = _information(sub, self.t.x_info, self.t.y_info, self.act, self.probes.bins)
        return layer_displacements(ws, w0), snr, info

    def keep(self, rows: torch.Tensor) -> None:
        """Drop finished seeds from the batch: keep the given rows of weights, state and initial weights."""
        self.opt.keep(rows)
        self.w0 = [w.index_select(0, rows) for w in self.w0]


def _train_cell(spec: CellSpec, model: ModelConfig, train: TrainConfig, probes: ProbeConfig, data: Dataset,
                progress: ProgressFn | None, dtype: torch.dtype, eval_rows: int | None) -> list[RunResult]:
    t_start = time.perf_counter()
    t = cell_tensors(data, dtype, eval_rows)
    budget = min(train.max_updates, spec.stop_after or train.max_updates)
    n_rows, n_in = t.x.shape
    stack = SeedStack(*stacked_weights(model, n_in, spec.depth, data.n_classes, spec.seeds, dtype))
    streams = [BatchStream(s, n_rows, train.batch_size) for s in spec.seeds]
    engine = _MlpEngine(stack, _Optimizer(train, spec.learning_rate, stack, streams[0].batch), t,
                        model.activation, probes)
    log = run_cell(engine, Schedule.build(probes, budget, spec.seeds, n_rows), streams,
                   Criterion.from_config(train.converge_when), budget, train.eval_every, len(t.y_val) > 0, progress)
    widths = model.widths(spec.depth)
    return cell_results(
        spec, train, probes, log, time.perf_counter() - t_start, len(widths) + 1,
        width=widths[0], n_params=count_params(data.n_features, widths, data.n_classes),
        activation=model.activation, init=model.init,
        # the network's shape, so that the fit can count the FLOPs of an update on any machine
        extra={"network": {"n_inputs": data.n_features, "n_classes": data.n_classes,
                           "widths": list(widths), "batch_size": train.batch_size}})
