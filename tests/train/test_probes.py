"""Displacement and gradient-SNR probes on processes with known answers."""
from __future__ import annotations

import numpy as np

from depthplan.train.probes import displacement, gradient_snr_db, log_spaced_steps


def _growth_exponent(steps: list[int], values: np.ndarray) -> float:
    return float(np.polyfit(np.log(steps), np.log(values), 1)[0])


def test_random_walk_grows_as_the_square_root_and_drift_linearly() -> None:
    # Feller, An Introduction to Probability Theory, vol. 1: the mean squared displacement of a
    # random walk grows linearly in the number of steps, so ||W_t - W_0|| grows as t**0.5;
    # a constant drift grows as t**1.
    rng = np.random.default_rng(0)
    n_walkers, n_steps, dim = 200, 4096, 16
    steps = log_spaced_steps(n_steps, 20)
    w0 = rng.standard_normal((n_walkers, dim))
    walk = w0[:, None, :] + np.cumsum(rng.standard_normal((n_walkers, n_steps, dim)), axis=1)
    drift = w0[:, None, :] + 0.01 * np.arange(1, n_steps + 1)[None, :, None]
    d_walk = np.array([displacement(walk[:, t - 1], w0).mean() for t in steps])
    d_drift = np.array([displacement(drift[:, t - 1], w0).mean() for t in steps])
    assert abs(_growth_exponent(steps, d_walk) - 0.5) < 0.03
    assert abs(_growth_exponent(steps, d_drift) - 1.0) < 1e-9


def test_snr_of_gradients_with_known_mean_and_variance() -> None:
    # decibel = 10 log10 of a power ratio; signal ||mu||^2 = 4 * 25 = 100, noise E||g - mu||^2 = 4 * 1
    rng = np.random.default_rng(1)
    mu = np.full((1, 2, 2), 5.0)                      # (seeds, 2, 2): ||mu||^2 = 100
    grads = mu + rng.standard_normal((20000, 1, 2, 2))
    snr = gradient_snr_db(grads)
    assert snr.shape == (1,)
    assert abs(snr[0] - 10 * np.log10(100 / 4)) < 0.1       # about 13.98 dB
    quiet = gradient_snr_db(0.01 * rng.standard_normal((20000, 1, 4)) + 1.0)
    assert abs(quiet[0] - 40.0) < 0.1                           # signal 4, noise 4e-4: 40 dB


def test_log_spaced_steps() -> None:
    s = log_spaced_steps(10000, 24)
    assert s[0] == 1 and s[-1] == 10000 and s == sorted(set(s))
    ratios = np.diff(np.log(s[5:]))
    assert ratios.max() < 2.5 * ratios.min()
