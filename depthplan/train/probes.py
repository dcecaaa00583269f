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


def displacement(w_t: np.ndarray, w_0: np.ndarray) -> np.ndarray:
    """||W_t - W_0||_F over all but the leading axis (one value per seed when stacked)."""
    d = np.asarray(w_t, dtype=np.float64) - np.asarray(w_0, dtype=np.float64)
    return np.sqrt((d.reshape(d.shape[0], -1) ** 2).sum(axis=1))


def gradient_snr_db(grads: np.ndarray) -> np.ndarray:
    """SNR in dB of a window of minibatch gradients.

    Args:
        grads: (window, n_seeds, ...) gradients of one layer, drawn at the same weights.

    Returns:
        (n_seeds,) 10 log10(||mean g||^2 / mean ||g - mean g||^2).
    """
    g = np.asarray(grads, dtype=np.float64)
    g = g.reshape(g.shape[0], g.shape[1], -1)
    mean = g.mean(axis=0)
    signal = (mean ** 2).sum(axis=1)
    noise = ((g - mean) ** 2).sum(axis=2).mean(axis=0)
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(np.maximum(signal, 1e-300) / np.maximum(noise, 1e-300))
