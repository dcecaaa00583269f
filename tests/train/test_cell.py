"""The per-cell loop shared by every trainer (cell.py): verdicts, seeds leaving the batch, the probe
schedule and the records, on a gradient-descent engine with a closed form and on the mlp trainer."""
from __future__ import annotations

import math
import sys

import numpy as np
import pytest
import torch

from depthplan.config import ConvergeConfig, DataConfig, ModelConfig, ProbeConfig, TrainConfig
from depthplan.records import CellSpec
from depthplan.train.batches import BatchStream
from depthplan.train.cell import CellLog, Schedule, layer_displacements, probe_fields, run_cell
from depthplan.train.convergence import Criterion
from depthplan.train.datasets import load_dataset
from depthplan.train.loop import train_cell
from depthplan.train.probes import probe_grids
from depthplan.train.reference import probe_plain, train_plain
from depthplan.train.stacked import SeedStack
from trainer_setup import NO_PROBES, OPTIMIZERS, RATES, curves, short_train

pytestmark = pytest.mark.usefixtures("one_thread")     # tests/train/conftest.py


# --------------------------------------------------------------------------- run_cell on a closed form

class QuadraticSeeds:
    """A `cell.Engine` whose seed k runs gradient descent on f_k(w) = lam_k w^2 / 2 from w0_k.

    Closed form (gradient descent on a quadratic; Nesterov 2004, section 1.2.3): after t updates at
    rate lr, w_t = w0 q^t with q = 1 - lr lam, so the loss is lam w0^2 q^(2t) / 2 and the
    displacement |w_t - w0| = |w0| |1 - q^t|.
    """

    def __init__(self, lams: list[float], w0: list[float], lr: float) -> None:
        self.lam, self.w, self.lr = np.array(lams), np.array(w0), lr
        self.w0 = self.w.copy()
        self.active_per_block: list[int] = []

    def minibatches(self, rows: np.ndarray):
        self.active_per_block.append(rows.shape[0])
        return range(rows.shape[1])            # the quadratic needs no data: one item per step

    def step(self, batch) -> None:
        self.w = self.w - self.lr * self.lam * self.w

    def evaluate(self, validation: bool):
        with np.errstate(over="ignore"):
            return 0.5 * self.lam * self.w ** 2, np.zeros(len(self.w))

    def validation(self, done, val_acc):
        return [math.nan] * len(done)

    def probe(self, rows, draws, sparse):
        return [np.abs(self.w - self.w0)[rows]], None, None

    def keep(self, rows: torch.Tensor) -> None:
        keep = rows.numpy()
        self.lam, self.w, self.w0 = self.lam[keep], self.w[keep], self.w0[keep]


LAMS, W0, LR, BELOW, BUDGET, EVERY = [1.0, 0.5, 0.01, 40.0], [1.0, -2.0, 1.0, 1.0], 0.1, 1e-3, 400, 20


def _closed_form_end(lam: float, w0: float) -> tuple[str, int]:
    """(status, T) by the closed form: the first evaluation step whose loss is below BELOW (converged)
    or overflows float64 (diverged; |q| > 1), else censored at the budget."""
    q = abs(1 - LR * lam)
    for t in range(EVERY, BUDGET + 1, EVERY):
        log_loss = math.log(0.5 * lam * w0 ** 2) + 2 * t * math.log(q)
        if log_loss > math.log(sys.float_info.max):
            return "diverged", t
        if log_loss < math.log(BELOW):
            return "converged", t
    return "censored", BUDGET


def _run(probes: ProbeConfig):
    seeds = tuple(range(len(LAMS)))
    engine = QuadraticSeeds(LAMS, W0, LR)
    streams = [BatchStream(s, 50, 8) for s in seeds]
    done: list[int] = []
    log = run_cell(engine, Schedule.build(probes, BUDGET, seeds, 50), streams, Criterion(train_loss_below=BELOW),
                   BUDGET, EVERY, False, done.append)
    return engine, log, done


def test_run_cell_ends_each_seed_where_the_closed_form_says_and_drops_it_from_the_batch() -> None:
    engine, log, done = _run(NO_PROBES)
    ends = [_closed_form_end(lam, w) for lam, w in zip(LAMS, W0)]
    # worked by hand too: 0.5 * 0.81^t < 1e-3 first at t = 40; 0.9025^t at 80; 0.005 * 0.998^t never
    # within 400; 20 * 9^t overflows float64 first at t = 340
    assert ends == [("converged", 40), ("converged", 80), ("censored", 400), ("diverged", 340)]
    for k, (status, t) in enumerate(ends):
        assert (log.ended[k]["status"], log.ended[k]["iterations"]) == (status, t)
        steps = [s for s, _ in log.curves[k]]
        assert steps == list(range(EVERY, t + 1, EVERY))               # evaluated every 20 until it ended
        expected = [0.5 * LAMS[k] * W0[k] ** 2 * (1 - LR * LAMS[k]) ** (2 * s) for s in steps[:-1]]
        np.testing.assert_allclose([v for _, v in log.curves[k][:-1]], expected, rtol=1e-11)
    assert not math.isfinite(log.ended[3]["loss"])
    # the batch: 4 seeds for 2 blocks, 3 for 2, 2 until the diverging seed leaves at 340, then 1
    assert engine.active_per_block == [4] * 2 + [3] * 2 + [2] * 13 + [1] * 3
    assert sum(done) == len(LAMS) * BUDGET          # a finished seed's unused budget counts as done
    assert len(log.walls(1.0)) == 4


def test_each_seed_is_probed_on_the_dense_grid_and_at_its_own_t() -> None:
    _, log, _ = _run(ProbeConfig(n_points=5, snr=False))
    dense, _ = probe_grids(BUDGET, 5)
    for k, lam in enumerate(LAMS):
        status, t = _closed_form_end(lam, W0[k])
        steps = [p[0] for p in log.probes[k]]
        at_end = [t] if status != "diverged" else []                   # a diverged seed is not probed at T
        assert steps == [s for s in dense if s < t] + at_end
        q = 1 - LR * lam
        np.testing.assert_allclose([p[1][0] for p in log.probes[k]],   # closed form |w0| |1 - q^s|
                                   [abs(W0[k]) * abs(1 - q ** s) for s in steps], rtol=1e-10)


# --------------------------------------------------------------------------- the schedule and the records

def test_a_seeds_snr_draws_depend_on_the_seed_alone() -> None:
    probes = ProbeConfig(n_points=5, snr_window=3)
    pair = Schedule.build(probes, 100, (5, 7), 50)
    alone = Schedule.build(probes, 100, (7,), 50)
    streams = [BatchStream(5, 50, 8), BatchStream(7, 50, 8)]
    together = pair.draws([0, 1], [0, 1], streams, sparse=True)
    assert together.shape == (2, 3, 8) and together.min() >= 0 and together.max() < 50
    np.testing.assert_array_equal(alone.draws([0], [0], streams[1:], sparse=True)[0], together[1])
    assert pair.draws([0], [0, 1], streams, sparse=False) is None
    dense, sparse = probe_grids(100, 5)
    assert (pair.dense_at, pair.sparse_at) == (set(dense), set(sparse))
    only_snr = Schedule.build(ProbeConfig(n_points=5, displacement=False), 100, (5,), 50)
    assert only_snr.dense_at == set(sparse)                            # no displacement: the SNR grid alone


def test_probe_fields_split_dense_and_sparse_probes() -> None:
    # hand-built log of one seed with two layers: SNR at steps 1 and 5 only
    plog = [(1, [0.1, 0.2], [3.0, 4.0], None), (2, [0.3, 0.4], None, None), (5, [0.5, 0.6], [1.0, 2.0], None)]
    assert probe_fields(ProbeConfig(), plog, 2) == {
        "probe_steps": (1, 2, 5), "displacement": ((0.1, 0.3, 0.5), (0.2, 0.4, 0.6)),
        "snr_steps": (1, 5), "snr_db": ((3.0, 1.0), (4.0, 2.0))}
    info = [(3, [0.1], None, [(2.0, 0.5)]), (4, [0.2], None, None)]
    assert probe_fields(ProbeConfig(snr=False, information=True), info, 1) == {
        "probe_steps": (3, 4), "displacement": ((0.1, 0.2),), "snr_steps": (3,),
        "information_xt": ((2.0,),), "information_ty": ((0.5,),)}
    assert probe_fields(ProbeConfig(), [], 2) == {}


def test_wall_time_is_seat_time_plus_an_even_share_of_setup() -> None:
    log = CellLog([[], [], []], [[], [], []], np.array([1.0, 2.0, 3.0]))
    assert log.walls(9.0) == [2.0, 3.0, 4.0]         # hand-computed: setup (9 - 6) / 3 = 1 each


def test_layer_displacements_are_frobenius_norms_per_seed() -> None:
    # reference: torch.linalg.norm (Frobenius) of each seed's W_t - W_0
    g = torch.Generator().manual_seed(0)
    w0 = [torch.randn(3, 4, 5, generator=g, dtype=torch.float64), torch.randn(3, 5, 2, generator=g, dtype=torch.float64)]
    ws = [w + torch.randn(w.shape, generator=g, dtype=torch.float64) for w in w0]
    got = layer_displacements(ws, w0)
    for layer, (w, w_init) in enumerate(zip(ws, w0)):
        np.testing.assert_allclose(got[layer], [float(torch.linalg.norm(w[k] - w_init[k])) for k in range(3)],
                                   rtol=1e-12)


# --------------------------------------------------------------------------- on the mlp trainer

@pytest.mark.parametrize("name", OPTIMIZERS)
def test_a_seed_that_converges_leaves_and_the_others_train_as_if_alone(data, monkeypatch, name) -> None:
    model, seeds, lr = ModelConfig(width=16), (0, 1, 2), RATES[name]
    free = curves(train_cell(CellSpec(2, seeds, lr), model, short_train(200, learning_rate=(lr,), **OPTIMIZERS[name]),
                             NO_PROBES, data, dtype=torch.float64))
    # a threshold the fastest seed meets by the second evaluation while the others are still above it
    fast = int(np.argmin(free[:, 1]))
    others_best = min(free[s, :2].min() for s in range(3) if s != fast)
    assert free[fast, 1] < others_best
    train = short_train(200, learning_rate=(lr,), **OPTIMIZERS[name],
                        converge_when=ConvergeConfig(train_loss_below=float(free[fast, 1] + others_best) / 2))

    seeds_per_step: list[int] = []
    forward = SeedStack.forward          # private: stacked.py names nothing public that shows the batch size
    monkeypatch.setattr(SeedStack, "forward", lambda self, x, act: (seeds_per_step.append(x.shape[0]), forward(self, x, act))[1])
    together = train_cell(CellSpec(2, seeds, lr), model, train, NO_PROBES, data, dtype=torch.float64)
    assert together[fast].status == "converged" and together[fast].iterations <= 40
    assert seeds_per_step[0] == 3 and min(seeds_per_step) < 3    # the batch shrank once a seed was done

    for k, seed in enumerate(seeds):
        alone = train_cell(CellSpec(2, (seed,), lr), model, train, NO_PROBES, data, dtype=torch.float64)[0]
        assert (alone.status, alone.iterations, alone.eval_steps) == (together[k].status, together[k].iterations,
                                                                      together[k].eval_steps)
        np.testing.assert_allclose(alone.train_loss, together[k].train_loss, rtol=1e-12)
        # reference: the plain per-seed loop stopping at the same rule
        plain = train_plain(CellSpec(2, (seed,), lr), model, train, data, dtype=torch.float64, until_converged=True)
        assert len(plain[0]) * train.eval_every == alone.iterations


def test_a_diverging_seed_is_marked_and_leaves_the_others_alone(data) -> None:
    model, train = ModelConfig(width=8, activation="relu", init_gain=3.0), short_train(100, learning_rate=(1e3,))
    results = train_cell(CellSpec(2, (0, 1), 1e3), model, train, NO_PROBES, data)   # float32 overflows
    bad = [r for r in results if r.status == "diverged"]
    assert len(bad) == 1 and bad[0].iterations == 20 and not math.isfinite(bad[0].final_train_loss)
    good = next(r for r in results if r.status != "diverged")
    alone = train_cell(CellSpec(2, (good.seed,), 1e3), model, train, NO_PROBES, data)[0]
    assert good.iterations == alone.iterations == 100
    np.testing.assert_allclose(good.train_loss, alone.train_loss, rtol=1e-5)


def test_records_probes_and_progress(data) -> None:
    done: list[int] = []
    spec = CellSpec(depth=3, seeds=(0, 1), learning_rate=0.05)
    results = train_cell(spec, ModelConfig(width=8), short_train(100), ProbeConfig(n_points=6, snr_window=4), data,
                         progress=done.append)
    assert sum(done) == 2 * 100
    for r in results:
        assert r.status == "censored" and r.iterations == 100 and r.eval_steps == (20, 40, 60, 80, 100)
        assert r.n_params == 12 * 8 + 8 + 2 * (8 * 8 + 8) + 8 * 3 + 3
        assert len(r.displacement) == len(r.snr_db) == 4                      # one series per layer
        assert all(len(d) == len(r.probe_steps) for d in r.displacement)
        assert all(len(d) == len(r.snr_steps) for d in r.snr_db)
        assert set(r.snr_steps) <= set(r.probe_steps) and len(r.snr_steps) < len(r.probe_steps)
        assert r.probe_steps[0] == r.snr_steps[0] == 1 and r.probe_steps[-1] == r.snr_steps[-1] == 100
        assert all(np.diff(d).min() > -1e-6 for d in r.displacement[:1])    # the first layer moves away
        # a value is measured or NaN (below the floor of a 4-draw window), never infinite
        assert not any(math.isinf(v) for d in r.snr_db for v in d)
        assert any(math.isfinite(v) for d in r.snr_db for v in d)
        assert 0.0 <= r.validation_accuracy <= 1.0 and r.wall_seconds > 0


def test_probes_end_at_each_seeds_own_t_on_digits_and_match_the_plain_loop() -> None:
    # A tiny real run: scikit-learn's digits (UCI, 1,797 8x8 images; DESIGN.md section 3), seeds
    # trained together that converge at different T. Each seed's probes must end at its own T
    # (the schedule before ended up to a third of T early), and the plain per-seed loop
    # (nn.Sequential + torch.optim, reference) must record the same probe steps and displacements.
    data = load_dataset(DataConfig(source="digits"))
    model, spec = ModelConfig(width=16), CellSpec(depth=1, seeds=(0, 1, 2), learning_rate=0.1)
    train = TrainConfig(learning_rate=(0.1,), max_updates=2000, eval_every=10,
                        converge_when=ConvergeConfig(train_loss_below=0.5))
    probes = ProbeConfig(n_points=12, snr_window=4)
    results = train_cell(spec, model, train, probes, data, dtype=torch.float64)
    assert all(r.status == "converged" for r in results) and len({r.iterations for r in results}) > 1
    for r in results:
        assert r.probe_steps[-1] == r.snr_steps[-1] == r.iterations < train.max_updates
        assert r.probe_steps[0] == 1 and list(r.probe_steps) == sorted(set(r.probe_steps))
        assert sum(s >= r.iterations / 2 for s in r.probe_steps) >= 3       # a late window to fit
    plain = probe_plain(spec, model, train, probes, data, dtype=torch.float64)
    for r, p in zip(results, plain):
        assert (p["status"], p["iterations"], tuple(p["probe_steps"])) == (r.status, r.iterations, r.probe_steps)
        np.testing.assert_allclose(r.displacement, p["displacement"], rtol=1e-9)
