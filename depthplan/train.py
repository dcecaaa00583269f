"""Train one cell (the seeds of one depth and learning rate) as one batched model.

The seeds' weights are stacked along a leading axis, (n_seeds, fan_in, fan_out),
and every update is a handful of batched matrix products with a hand-written
backward pass: no autograd graph and no per-seed Python loop, which is where a
CPU spends most of its time on networks this small. Each seed keeps its own
initial weights and its own minibatch order, so its trajectory equals what a
plain per-seed `nn.Sequential` + `torch.optim` loop computes (`train_plain`,
kept here for the tests and the benchmark). Seeds that finish leave the batch.
"""
from __future__ import annotations

import math
import time
from typing import Callable

import numpy as np
import torch
import torch.nn.functional as F

from .config import ModelConfig, ProbeConfig, TrainConfig
from .convergence import Criterion, verdict
from .datasets import Dataset
from .models import build_mlp, count_params, init_weights
from .probes import gradient_snr_db, log_spaced_steps
from .records import CellSpec, RunResult

ProgressFn = Callable[[int], None]

#: Largest (n_seeds x rows x width) block evaluated at once on the full training set.
EVAL_BLOCK = 1 << 22


class BatchStream:
    """One seed's minibatch order: shuffled epochs of the training set, full batches only."""

    def __init__(self, seed: int, n_rows: int, batch_size: int, salt: int = 0xBA7C4) -> None:
        self.rng = np.random.default_rng([int(seed), salt])
        self.n_rows = n_rows
        self.batch = min(batch_size, n_rows)
        self.per_epoch = (n_rows // self.batch) * self.batch
        self.buf = np.empty(0, dtype=np.int64)

    def take(self, n_steps: int) -> np.ndarray:
        """Row indices of the next `n_steps` minibatches, shape (n_steps, batch)."""
        need = n_steps * self.batch
        parts = [self.buf]
        have = len(self.buf)
        while have < need:
            perm = self.rng.permutation(self.n_rows)[: self.per_epoch]
            parts.append(perm)
            have += len(perm)
        buf = np.concatenate(parts)
        self.buf = buf[need:]
        return buf[:need].reshape(n_steps, self.batch)


# --------------------------------------------------------------------------- batched maths

def _act(name: str, z: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """Activation and its derivative at z (both shaped like z)."""
    if name == "tanh":
        # tanh(x) = 2 sigmoid(2x) - 1: the same function, and sigmoid is far cheaper in this torch build
        h = torch.sigmoid(z * 2.0).mul_(2.0).sub_(1.0)
        return h, 1.0 - h * h
    if name == "relu":
        return torch.relu(z), (z > 0).to(z.dtype)
    if name == "sigmoid":
        h = torch.sigmoid(z)
        return h, h * (1.0 - h)
    # exact gelu: x * Phi(x); derivative Phi(x) + x * phi(x)
    cdf = 0.5 * (1.0 + torch.erf(z * (1.0 / math.sqrt(2.0))))
    pdf = torch.exp(-0.5 * z * z) * (1.0 / math.sqrt(2.0 * math.pi))
    return z * cdf, cdf + z * pdf


def _gradients(ws: list[torch.Tensor], bs: list[torch.Tensor], xb: torch.Tensor, yb: torch.Tensor,
               act: str) -> list[torch.Tensor]:
    """Mean cross-entropy gradients of every seed's minibatch.

    Args:
        ws: per layer (n_seeds, fan_in, fan_out); bs: per layer (n_seeds, 1, fan_out).
        xb: (n_seeds, batch, n_features); yb: (n_seeds, batch) class indices.

    Returns:
        [dW_1, ..., dW_L, db_1, ..., db_L] shaped like ws + bs.
    """
    hs, ds = [xb], []
    h = xb
    for w, b in zip(ws[:-1], bs[:-1]):
        h, d = _act(act, torch.baddbmm(b, h, w))      # (n_seeds, batch, width)
        hs.append(h)
        ds.append(d)
    logits = torch.baddbmm(bs[-1], h, ws[-1])         # (n_seeds, batch, n_classes)
    g = torch.softmax(logits, dim=2)
    g.scatter_add_(2, yb.unsqueeze(2), torch.full(yb.shape + (1,), -1.0, dtype=g.dtype))
    g.mul_(1.0 / xb.shape[1])
    gw: list[torch.Tensor] = [None] * len(ws)  # type: ignore[list-item]
    gb: list[torch.Tensor] = [None] * len(ws)  # type: ignore[list-item]
    for layer in range(len(ws) - 1, -1, -1):
        gw[layer] = torch.bmm(hs[layer].transpose(1, 2), g)
        gb[layer] = g.sum(dim=1, keepdim=True)
        if layer:
            g = torch.bmm(g, ws[layer].transpose(1, 2)).mul_(ds[layer - 1])
    return gw + gb


def _evaluate(ws: list[torch.Tensor], bs: list[torch.Tensor], x: torch.Tensor, y: torch.Tensor,
              act: str) -> tuple[np.ndarray, np.ndarray]:
    """Mean cross-entropy and accuracy of every seed on all of (x, y), in row blocks."""
    n_seeds, n_rows = ws[0].shape[0], x.shape[0]
    width = max(w.shape[2] for w in ws)
    step = max(1, EVAL_BLOCK // max(1, n_seeds * width))
    loss = torch.zeros(n_seeds, dtype=torch.float64)
    hits = torch.zeros(n_seeds, dtype=torch.float64)
    for lo in range(0, n_rows, step):
        xc, yc = x[lo:lo + step], y[lo:lo + step]
        h = torch.matmul(xc, ws[0]).add_(bs[0])       # (n_seeds, rows, fan_out)
        for w, b in zip(ws[1:], bs[1:]):
            h = torch.baddbmm(b, _act(act, h)[0], w)
        lse = torch.logsumexp(h, dim=2)
        picked = h.gather(2, yc.expand(n_seeds, -1).unsqueeze(2)).squeeze(2)
        loss += (lse - picked).sum(dim=1).double()
        hits += (h.argmax(dim=2) == yc).sum(dim=1).double()
    return (loss / n_rows).numpy(), (hits / n_rows).numpy()


class _Optimizer:
    """SGD (optionally with momentum) or Adam on stacked tensors, with torch.optim's update rules."""

    def __init__(self, cfg: TrainConfig, lr: float, params: list[torch.Tensor]) -> None:
        self.kind, self.lr, self.mu = cfg.optimizer, lr, cfg.momentum
        self.params = params
        self.state: list[list[torch.Tensor]] = [[] for _ in params]
        self.t = 0

    def step(self, grads: list[torch.Tensor]) -> None:
        self.t += 1
        for i, (p, g) in enumerate(zip(self.params, grads)):
            st = self.state[i]
            if self.kind == "adam":
                b1, b2, eps = 0.9, 0.999, 1e-8
                if not st:
                    st += [torch.zeros_like(p), torch.zeros_like(p)]
                st[0].mul_(b1).add_(g, alpha=1 - b1)
                st[1].mul_(b2).addcmul_(g, g, value=1 - b2)
                denom = (st[1] / (1 - b2 ** self.t)).sqrt_().add_(eps)
                p.addcdiv_(st[0], denom, value=-self.lr / (1 - b1 ** self.t))
            elif self.mu > 0:
                if not st:
                    st.append(g.clone())
                else:
                    st[0].mul_(self.mu).add_(g)
                p.add_(st[0], alpha=-self.lr)
            else:
                p.add_(g, alpha=-self.lr)

    def keep(self, rows: torch.Tensor) -> None:
        """Drop finished seeds (keep the given rows) from parameters and state."""
        for i, p in enumerate(self.params):
            self.params[i] = p.index_select(0, rows)
            self.state[i] = [s.index_select(0, rows) for s in self.state[i]]


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
               dtype: torch.dtype = torch.float32) -> list[RunResult]:
    """Train every seed of `spec` to convergence, censoring or divergence.

    Args:
        spec: depth, seeds, learning rate (and an early-censoring budget) of the cell.
        model, train, probes: the matching sections of the sweep file.
        data: the task; the full training set is evaluated every `train.eval_every` updates.
        progress: called with seed-updates done (a finished seed's unused budget counts as done).

    Returns:
        One `RunResult` per seed, in the order of `spec.seeds`.
    """
    t_start = time.perf_counter()
    x = torch.from_numpy(data.x_train).to(dtype)
    y = torch.from_numpy(data.y_train)
    x_val = torch.from_numpy(data.x_val).to(dtype)
    y_val = torch.from_numpy(data.y_val)
    n_rows, n_in = x.shape
    criterion = Criterion.from_config(train.converge_when)
    budget = min(train.max_updates, spec.stop_after or train.max_updates)
    seeds = spec.seeds
    n_seeds = len(seeds)

    ws, bs = stacked_weights(model, n_in, spec.depth, data.n_classes, seeds, dtype)
    n_layers = len(ws)
    w0 = [w.clone() for w in ws]
    opt = _Optimizer(train, spec.learning_rate, ws + bs)
    streams = [BatchStream(s, n_rows, train.batch_size) for s in seeds]
    probe_rngs = [np.random.default_rng([int(s), 0x5A1]) for s in seeds]
    probe_at = set(log_spaced_steps(budget, probes.n_points)) if (probes.displacement or probes.snr) else set()

    active = list(range(n_seeds))                      # positions in `seeds` still training
    curves: list[list[tuple[int, float]]] = [[] for _ in seeds]
    probe_log: list[list[tuple[int, list[float], list[float]]]] = [[] for _ in seeds]
    seat_time = np.zeros(n_seeds)
    ended: dict[int, dict] = {}
    step = 0

    def probe(step_now: int) -> None:
        params = opt.params
        disp = [(params[i] - w0[i]).flatten(1).norm(dim=1).double().numpy() for i in range(n_layers)]
        snr = [np.full(len(active), math.nan)] * n_layers
        if probes.snr:
            rows = np.stack([probe_rngs[a].integers(0, n_rows, (probes.snr_window, streams[a].batch)) for a in active])
            idx = torch.from_numpy(rows)                # (n_active, window, batch)
            window = [_gradients(params[:n_layers], params[n_layers:], x[idx[:, j]], y[idx[:, j]],
                                 model.activation)[:n_layers] for j in range(probes.snr_window)]
            snr = [gradient_snr_db(np.stack([g[i].double().numpy() for g in window])) for i in range(n_layers)]
        for k, a in enumerate(active):
            probe_log[a].append((step_now, [float(d[k]) for d in disp], [float(s[k]) for s in snr]))

    while active:
        t_block = time.perf_counter()
        n = min(train.eval_every - step % train.eval_every, budget - step)
        idx = torch.from_numpy(np.stack([streams[a].take(n) for a in active]))   # (n_active, n, batch)
        for j in range(n):
            if step in probe_at:
                probe(step)
            params = opt.params
            opt.step(_gradients(params[:n_layers], params[n_layers:], x[idx[:, j]], y[idx[:, j]], model.activation))
            step += 1
        if step in probe_at and step == budget:
            probe(step)
        params = opt.params
        loss, acc = _evaluate(params[:n_layers], params[n_layers:], x, y, model.activation)
        val_acc = np.full(len(active), math.nan)
        if criterion.needs_validation and len(y_val):
            val_acc = _evaluate(params[:n_layers], params[n_layers:], x_val, y_val, model.activation)[1]
        done, keep = [], []
        for k, a in enumerate(active):
            curves[a].append((step, float(loss[k])))
            v = verdict(criterion, step, budget, float(loss[k]), float(acc[k]), float(val_acc[k]))
            (keep if v is None else done).append(k)
            if v is not None:
                ended[a] = {"status": v, "iterations": step, "loss": float(loss[k]), "acc": float(acc[k])}
        seat_time[active] += (time.perf_counter() - t_block) / len(active)
        if done:
            if len(y_val):
                rows_done = torch.tensor(done)
                sub = [p.index_select(0, rows_done) for p in params]
                val_done = _evaluate(sub[:n_layers], sub[n_layers:], x_val, y_val, model.activation)[1]
                for k, v in zip(done, val_done):
                    ended[active[k]]["val"] = float(v)
            rows_keep = torch.tensor(keep, dtype=torch.long)
            opt.keep(rows_keep)
            w0 = [w.index_select(0, rows_keep) for w in w0]
        if progress is not None:
            progress(n * len(active) + len(done) * (budget - step))
        active = [active[k] for k in keep]

    setup = (time.perf_counter() - t_start - seat_time.sum()) / n_seeds
    widths = model.widths(spec.depth)
    results = []
    for a, seed in enumerate(seeds):
        e = ended[a]
        wall = float(seat_time[a] + setup)
        plog = probe_log[a]
        results.append(RunResult(
            depth=spec.depth, width=widths[0], seed=seed, learning_rate=spec.learning_rate,
            status=e["status"], iterations=e["iterations"], wall_seconds=wall,
            seconds_per_update=wall / max(1, e["iterations"]),
            final_train_loss=e["loss"], final_train_accuracy=e["acc"],
            validation_accuracy=e.get("val", math.nan),
            n_params=count_params(n_in, widths, data.n_classes),
            activation=model.activation, init=model.init, optimizer=train.optimizer,
            lr_mode=spec.lr_mode, cell_id=spec.cell_id,
            eval_steps=tuple(s for s, _ in curves[a]), train_loss=tuple(v for _, v in curves[a]),
            probe_steps=tuple(p[0] for p in plog),
            displacement=tuple(tuple(p[1][i] for p in plog) for i in range(n_layers)) if probes.displacement and plog else (),
            snr_db=tuple(tuple(p[2][i] for p in plog) for i in range(n_layers)) if probes.snr and plog else (),
        ))
    return results


# --------------------------------------------------------------------------- the plain loop

def train_plain(spec: CellSpec, model: ModelConfig, train: TrainConfig, data: Dataset, *,
                n_updates: int | None = None, dtype: torch.dtype = torch.float32) -> list[list[float]]:
    """Reference: each seed alone, `nn.Sequential` + `torch.optim`, same init and batch order.

    No convergence test: runs `n_updates` (default `train.max_updates`) updates and
    returns each seed's full-training-set loss after every `train.eval_every` updates.
    Used to check the batched trainer and as the benchmark's baseline.
    """
    x = torch.from_numpy(data.x_train).to(dtype)
    y = torch.from_numpy(data.y_train)
    n_updates = n_updates or train.max_updates
    out = []
    for seed in spec.seeds:
        net = build_mlp(model, x.shape[1], spec.depth, data.n_classes, seed, dtype)
        if train.optimizer == "adam":
            opt: torch.optim.Optimizer = torch.optim.Adam(net.parameters(), lr=spec.learning_rate)
        else:
            opt = torch.optim.SGD(net.parameters(), lr=spec.learning_rate, momentum=train.momentum)
        stream = BatchStream(seed, x.shape[0], train.batch_size)
        losses = []
        for step in range(1, n_updates + 1):
            rows = torch.from_numpy(stream.take(1)[0])
            opt.zero_grad(set_to_none=True)
            F.cross_entropy(net(x[rows]), y[rows]).backward()
            opt.step()
            if step % train.eval_every == 0:
                with torch.no_grad():
                    losses.append(float(F.cross_entropy(net(x), y)))
        out.append(losses)
    return out
