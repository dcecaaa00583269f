"""The bias-corrected gradient SNR: simulated gradients of known SNR and the NaN path (on a real
network against autograd: tests/train/test_stacked.py)."""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from depthplan.fitting.diffusion import diffusion_summary, snr_drop_db, transition_step
from depthplan.records import RunResult, write_runs_jsonl
from depthplan.train.probes import gradient_snr_db, log_spaced_steps

WINDOW = 16


def _plain_snr_db(grads: np.ndarray) -> np.ndarray:
    """The uncorrected ratio 10 log10(||mean g||^2 / mean ||g - mean g||^2), written out from its definition."""
    mean = grads.mean(axis=0)
    return 10 * np.log10((mean ** 2).sum(axis=-1) / ((grads - mean) ** 2).sum(axis=-1).mean(axis=0))


def _below_floor_last(snr: np.ndarray) -> np.ndarray:
    """NaN (below the window's floor) ranks below every measured value, so medians stay order statistics."""
    return np.where(np.isnan(snr), -np.inf, snr)


def _simulated_windows(true_db: float, variances: np.ndarray, n_windows: int, seed: int) -> np.ndarray:
    """(WINDOW, n_windows, d) draws g = mu + noise, noise ~ N(0, diag(variances)), ||mu||^2 / tr Sigma = true SNR."""
    rng = np.random.default_rng(seed)
    d = len(variances)
    direction = rng.standard_normal(d)
    mu = direction / np.linalg.norm(direction) * math.sqrt(10 ** (true_db / 10) * variances.sum())
    noise = rng.standard_normal((WINDOW, n_windows, d), dtype=np.float32) * np.sqrt(variances).astype(np.float32)
    return noise.astype(np.float64) + mu


NOISE = {"isotropic": np.ones(2000),
         "anisotropic": np.logspace(0.0, 2.0, 2000)}     # variances spread over two decades
LEVELS_DB = (-30.0, -20.0, -10.0, 0.0, 10.0, 20.0)


def _medians(true_db: float, variances: np.ndarray, seed: int) -> tuple[float, float]:
    """Median over 1000 seeded windows of the corrected and of the plain estimate, in dB."""
    corrected, plain = [], []
    for chunk in range(4):
        g = _simulated_windows(true_db, variances, 250, seed + chunk)
        corrected.append(gradient_snr_db(g))
        plain.append(_plain_snr_db(g))
    return (float(np.median(_below_floor_last(np.concatenate(corrected)))),
            float(np.median(np.concatenate(plain))))


@pytest.mark.parametrize("noise", NOISE)
def test_corrected_snr_recovers_the_true_snr_from_minus_30_to_plus_20_db(noise) -> None:
    # Seeded synthetic gradients with known answer: true SNR = ||mu||^2 / tr Sigma by construction.
    # Closed form: E||gbar||^2 = ||mu||^2 + tr Sigma / n and E S = tr Sigma, so the corrected signal
    # ||gbar||^2 - S / n is unbiased; the plain ratio tends to (SNR + 1/n) / ((n - 1)/n), whose floor
    # at n = 16 is 10 log10(1/15) = -11.8 dB.
    variances = NOISE[noise]
    for k, true_db in enumerate(LEVELS_DB):
        corrected, plain = _medians(true_db, variances, seed=100 * k + (noise == "anisotropic"))
        assert abs(corrected - true_db) < 1.5, (noise, true_db, corrected)   # known answer
        expected_plain = 10 * math.log10((10 ** (true_db / 10) + 1 / WINDOW) / ((WINDOW - 1) / WINDOW))
        assert abs(plain - expected_plain) < 0.5, (noise, true_db, plain)    # closed form above
        if true_db == -30.0:
            assert abs(plain - true_db) > 1.5      # the plain estimator fails the same test at -30 dB
            assert plain > -12.5                   # it reads near its floor instead (closed form above)


def test_windows_without_signal_fall_below_the_floor_about_half_the_time() -> None:
    # Closed form: with mu = 0 the corrected signal has mean zero, so about half the windows are
    # not positive (slightly more: ||gbar||^2 is a scaled chi-square, skewed right, median below mean).
    g = _simulated_windows(-math.inf, np.ones(400), 2000, seed=7)
    snr = gradient_snr_db(g)
    assert 0.45 < np.isnan(snr).mean() < 0.6
    assert np.isnan(gradient_snr_db(np.zeros((WINDOW, 1, 3)))).all()   # no gradient: no number
    assert gradient_snr_db(np.ones((WINDOW, 1, 3)))[0] == math.inf      # identical draws: no noise
    with pytest.raises(ValueError):
        gradient_snr_db(np.ones((1, 1, 3)))                             # S needs two draws


# --------------------------------------------------------------------------- NaN downstream

def _probe_series(late_db: float) -> tuple[list[int], np.ndarray]:
    """Seeded synthetic SNR: 20 dB early, `late_db` late (NaN = below the floor), switch at step 300."""
    steps = log_spaced_steps(10000, 20)
    snr = np.where(np.array(steps) < 300, 20.0, late_db)
    return steps, snr


def test_below_floor_probes_give_no_invented_drop_and_json_nulls(tmp_path) -> None:
    steps, measured = _probe_series(-10.0)
    assert snr_drop_db(steps, measured) == pytest.approx(30.0)        # known answer: 20 - (-10)
    steps, lost = _probe_series(math.nan)
    assert math.isnan(snr_drop_db(steps, lost))                       # the late level is below the floor
    assert math.isnan(transition_step(steps, lost))
    # A below-floor probe in the middle keeps its rank: the transition is the first probe below halfway.
    mixed = measured.copy()
    first_late = int(np.argmax(mixed < 0))
    mixed[first_late] = math.nan
    assert snr_drop_db(steps, mixed) == pytest.approx(30.0)
    assert transition_step(steps, mixed) == steps[first_late]

    runs = [RunResult(depth=2, width=8, seed=s, learning_rate=0.1, status="converged", iterations=10000,
                      wall_seconds=1.0, seconds_per_update=1e-4, final_train_loss=0.1,
                      final_train_accuracy=1.0, validation_accuracy=math.nan, n_params=0,
                      probe_steps=tuple(steps), displacement=(tuple(np.sqrt(steps)),),
                      snr_db=(tuple(lost),)) for s in range(3)]
    summary = diffusion_summary(runs)
    assert summary["snr_drop_db_median"] is None and summary["layers"][0]["snr_drop_db"] is None
    json.dumps(summary, allow_nan=False)                               # fit.json's writer accepts it
    path = write_runs_jsonl(runs, tmp_path / "runs.jsonl")             # runs.jsonl: NaN stored as null
    back = RunResult.from_dict(json.loads(path.read_text().splitlines()[0]))
    assert json.loads(path.read_text().splitlines()[0])["snr_db"][0][-1] is None
    assert np.array_equal(np.isnan(back.snr_db[0]), np.isnan(lost))
