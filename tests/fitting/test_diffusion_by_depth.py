"""Tests of the per-depth probe summary (`diffusion.by_depth`, `diffusion.no_drop_note`).

The runs here are invented with known answers: each layer's displacement is c * t^a exactly
(so the log-log growth exponent is a, by least squares on exact power-law data), and its SNR is
a step from a level E (up to step 50) to E - drop (after it), so the drop between the medians of
the first and last fifth of the probes is exactly `drop` and the halfway crossing, interpolated
on log steps, is the geometric mean of the probes either side of step 50. Seed-to-seed offsets
are drawn from a seeded generator and the expected medians and quartiles are computed from those
drawn parameters with numpy (brute force over the generating values).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from depthplan.fit_record import DiffusionDepth, FitResult
from depthplan.fitting import diffusion_summary, fit_runs
from depthplan.fitting.diffusion import NO_DROP_DB, no_drop_note
from depthplan.records import RunResult

STEPS = tuple(int(s) for s in np.unique(np.geomspace(1, 4000, 20).astype(int)))
EARLY_DB = 5.0
SWITCH = 50                                 # the SNR steps down after this step
DROP = {1: 10.0, 2: 8.0, 4: 5.0, 12: 1.0, 16: 0.0}       # the median drop per depth, dB
EXPONENT = {1: 1.0, 2: 0.8, 4: 0.6, 12: 0.5, 16: 0.4}    # displacement = c * t^a per depth
DELTAS = (-1.0, -0.5, 0.5, 1.0)             # per-seed change of the drop: median 0


def _run(depth: int, seed: int, drop: float, offset: float, a: float, *,
         below_floor_after: int | None = None) -> RunResult:
    """One run of `depth` + 1 identical layers; SNR NaN (below the floor) after a step if asked."""
    t = np.asarray(STEPS, float)
    snr = np.where(t <= SWITCH, EARLY_DB, EARLY_DB - drop) + offset
    if below_floor_after is not None:
        snr = np.where(t > below_floor_after, np.nan, snr)
    disp = 0.01 * (1 + seed) * t ** a
    n = depth + 1
    return RunResult(depth=depth, width=8, seed=seed, learning_rate=0.02, status="converged",
                     iterations=int(9000 / depth), wall_seconds=1.0, seconds_per_update=1e-5 * depth,
                     final_train_loss=0.1, final_train_accuracy=1.0, validation_accuracy=0.9,
                     n_params=100 * n, probe_steps=STEPS,
                     displacement=tuple(tuple(disp) for _ in range(n)),
                     snr_db=tuple(tuple(snr) for _ in range(n)))


@pytest.fixture(scope="module")
def invented():
    """Runs at five depths, four seeds each, with seeded offsets; and the offsets drawn."""
    rng = np.random.default_rng(11)
    offsets = {k: rng.normal(0, 1.0, len(DELTAS)) for k in DROP}
    runs = [_run(k, s, DROP[k] + d, float(offsets[k][s]), EXPONENT[k])
            for k in DROP for s, d in enumerate(DELTAS)]
    return runs, offsets


def _row(summary: dict, depth: int) -> dict:
    return next(r for r in summary["by_depth"] if r["depth"] == depth)


def test_by_depth_recovers_the_drop_and_exponent_of_each_depth(invented):
    runs, offsets = invented
    d = diffusion_summary(runs)
    assert [r["depth"] for r in d["by_depth"]] == sorted(DROP)
    for k in DROP:
        row = _row(d, k)
        assert row["n_runs"] == 4 and row["spread"] == "iqr"
        # closed form: median of drop + DELTAS is drop; their quartiles are drop -/+ 0.625
        assert row["snr_drop_db"] == pytest.approx(DROP[k], abs=1e-9)
        assert row["snr_drop_db_lo"] == pytest.approx(DROP[k] - 0.625, abs=1e-9)
        assert row["snr_drop_db_hi"] == pytest.approx(DROP[k] + 0.625, abs=1e-9)
        # least squares on exact power-law data: the exponent, with no spread between seeds
        for key in ("early_exponent", "late_exponent"):
            assert row[key] == pytest.approx(EXPONENT[k], abs=1e-9)
            assert row[f"{key}_hi"] - row[f"{key}_lo"] == pytest.approx(0.0, abs=1e-9)
        # the first probe is at the early level plus the seed's offset (brute force over seeds)
        assert row["snr_first_db"] == pytest.approx(EARLY_DB + np.median(offsets[k]), abs=1e-9)
        assert row["snr_first_db_lo"] == pytest.approx(EARLY_DB + np.quantile(offsets[k], 0.25), abs=1e-9)
        last = EARLY_DB - (DROP[k] + np.array(DELTAS)) + offsets[k]
        assert row["snr_last_db"] == pytest.approx(np.median(last), abs=1e-9)
        assert row["snr_last_db_hi"] == pytest.approx(np.quantile(last, 0.75), abs=1e-9)
    # a transition (drop >= 3 dB in every seed) sits halfway on log steps across step 50
    before, after = max(s for s in STEPS if s <= SWITCH), min(s for s in STEPS if s > SWITCH)
    assert _row(d, 1)["transition_step"] == pytest.approx(math.sqrt(before * after), rel=1e-9)
    assert _row(d, 16)["transition_step"] is None          # no seed drops by 3 dB
    # the pooled fields stay as they were: one row per (depth, layer)
    assert len(d["layers"]) == sum(k + 1 for k in DROP)


def test_fewer_than_four_runs_give_the_range(invented):
    runs, _ = invented
    d = diffusion_summary([r for r in runs if r.seed < 3])
    row = _row(d, 2)
    assert row["n_runs"] == 3 and row["spread"] == "min_max"
    # min and max of drop + DELTAS[:3]
    assert row["snr_drop_db_lo"] == pytest.approx(DROP[2] + DELTAS[0], abs=1e-9)
    assert row["snr_drop_db_hi"] == pytest.approx(DROP[2] + DELTAS[2], abs=1e-9)


def test_probes_below_the_floor_give_null_never_nan(invented):
    runs, offsets = invented
    # depth 2: every seed is below the floor after step 200, so the late level, the drop and the
    # last SNR are unknown; depth 4: only seed 0 is, so its last SNR ranks lowest
    low = [_run(2, s, DROP[2], float(offsets[2][s]), EXPONENT[2], below_floor_after=200)
           for s in range(4)]
    one = [_run(4, s, DROP[4], float(offsets[4][s]), EXPONENT[4],
                below_floor_after=200 if s == 0 else None) for s in range(4)]
    d = diffusion_summary(low + one)
    json.dumps(d, allow_nan=False)                      # raises on NaN or infinity
    row = _row(d, 2)
    assert row["snr_drop_db"] is None and row["snr_last_db"] is None
    assert row["snr_last_db_lo"] is None and row["snr_last_db_hi"] is None
    assert row["snr_first_db"] == pytest.approx(EARLY_DB + np.median(offsets[2]), abs=1e-9)
    row = _row(d, 4)
    measured = np.sort([EARLY_DB - DROP[4] + offsets[4][s] for s in (1, 2, 3)])
    # sorted per-run values: (below floor, m0, m1, m2): the median is (m0 + m1) / 2 ...
    assert row["snr_last_db"] == pytest.approx(0.5 * (measured[0] + measured[1]), abs=1e-9)
    # ... the first quartile lies between the below-floor run and m0: below the floor, null
    assert row["snr_last_db_lo"] is None
    assert row["snr_last_db_hi"] == pytest.approx(np.quantile([-1e9, *measured], 0.75), abs=1e-9)
    assert d["no_drop_note"] == ""                      # depth 4 (the deepest with a drop) drops


def test_the_no_drop_note_names_the_first_depth_of_the_flat_tail(invented):
    runs, _ = invented
    # DROP: 10, 8, 5 dB at K = 1, 2, 4; 1 and 0 dB (under the 2 dB threshold) at K = 12, 16
    assert NO_DROP_DB == 2.0
    assert diffusion_summary(runs)["no_drop_note"] == (
        "From K = 12 on, the gradient SNR does not drop (median drop under 2 dB).")
    rows = [{"depth": k, "snr_drop_db": v} for k, v in
            ((1, 10.0), (2, 1.0), (4, 5.0), (8, 1.5), (16, 0.2), (24, None))]
    # a dip at K = 2 is not the tail; a depth without a drop value is passed over
    assert no_drop_note(rows).startswith("From K = 8 on,")
    assert no_drop_note(rows[:3]) == ""                 # the deepest still drops
    assert no_drop_note([{"depth": 3, "snr_drop_db": 0.5}]).startswith("At no probed depth")
    assert no_drop_note(rows, threshold_db=6.0).startswith("From K = 2 on,")


def test_by_depth_reads_back_as_records(invented):
    runs, _ = invented
    fit = fit_runs(runs, n_boot=20)
    result = FitResult.from_dict(fit)
    assert json.dumps(result.to_dict(), indent=2, allow_nan=False) == json.dumps(fit, indent=2, allow_nan=False)
    first = result.diffusion.by_depth[0]
    assert isinstance(first, DiffusionDepth)
    assert first.snr_drop_db == pytest.approx(DROP[1], abs=1e-9)     # the known drop at K = 1
    assert result.diffusion.no_drop_note.startswith("From K = 12 on,")
