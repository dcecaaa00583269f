"""Training-dynamics probes: weight displacement and gradient signal-to-noise ratio.

Functions on numpy arrays, so tests can feed simulated walks and known
gradient distributions, and the trainer can feed stacked weights.
"""
from __future__ import annotations

import math

import numpy as np


def log_spaced_steps(max_updates: int, n_points: int) -> list[int]:
    """About `n_points` distinct integer steps from 1 to `max_updates`, evenly spaced in log."""
    raw = np.logspace(0.0, math.log10(max(max_updates, 1)), n_points)
    return sorted({int(round(v)) for v in raw})


#: Displacement probes per interval of the gradient-SNR schedule: the displacement costs one
#: subtraction per layer, an SNR probe `snr_window` extra gradients, so the displacement is
#: recorded this many times more densely (about 6 points per doubling of t at the defaults),
#: enough for a slope with an interval over the last half of a run.
DENSE_FACTOR = 4


def probe_grids(max_updates: int, n_points: int, dense: int = DENSE_FACTOR) -> tuple[list[int], list[int]]:
    """(dense steps, SNR steps): log-spaced steps from 1 to `max_updates`, the second a subset.

    The SNR grid has about `n_points` steps; the dense grid `dense` times as many, on the same
    log-spaced positions refined (so every SNR step is a dense step). A run probes both grids up
    to its own end T and adds T itself (`run_probe_steps`).
    """
    top = math.log10(max(max_updates, 1))
    fine = np.logspace(0.0, top, dense * (n_points - 1) + 1)
    coarse = fine[::dense]
    return sorted({int(round(v)) for v in fine}), sorted({int(round(v)) for v in coarse})


def run_probe_steps(grid: list[int] | tuple[int, ...], end: int) -> list[int]:
    """The steps of `grid` up to a run's end step T, with T itself last: one run's probe list."""
    return [s for s in grid if s < end] + [end]


def displacement(w_t: np.ndarray, w_0: np.ndarray) -> np.ndarray:
    """||W_t - W_0||_F over all but the leading axis (one value per seed when stacked)."""
    d = np.asarray(w_t, dtype=np.float64) - np.asarray(w_0, dtype=np.float64)
    return np.sqrt((d.reshape(d.shape[0], -1) ** 2).sum(axis=1))


def gradient_snr_db(grads: np.ndarray) -> np.ndarray:
    """Bias-corrected SNR in dB of a window of n minibatch gradients drawn at the same weights.

    With gbar the window mean and S = sum_i ||g_i - gbar||^2 / (n - 1) (unbiased for the noise
    power tr Sigma), ||gbar||^2 - S / n is unbiased for the signal power ||E g||^2, and the SNR is
    (||gbar||^2 - S / n) / S. The plain ratio ||gbar||^2 / S keeps the noise tr(Sigma) / n left in
    gbar and so cannot read much below 10 log10(1 / (n - 1)) dB, whatever the true SNR.

    Args:
        grads: (window, n_seeds, ...) gradients of one layer, window >= 2.

    Returns:
        (n_seeds,) SNR in dB; NaN where the corrected signal is not positive (the SNR is below
        what this window can resolve) or the window is all zeros; +inf where the draws agree
        exactly but are not zero (no noise).
    """
    g = np.asarray(grads, dtype=np.float64)
    n = g.shape[0]
    if n < 2:
        raise ValueError(f"an SNR window needs at least 2 gradients, got {n}")
    g = g.reshape(n, g.shape[1], -1)
    mean = g.mean(axis=0)
    noise = ((g - mean) ** 2).sum(axis=2).sum(axis=0) / (n - 1)
    signal = (mean ** 2).sum(axis=1) - noise / n
    out = np.full(signal.shape, np.nan)
    ok = signal > 0
    with np.errstate(divide="ignore"):
        out[ok] = 10.0 * np.log10(signal[ok] / noise[ok])
    return out
