"""Probe measures: growth exponents, the SNR drop and transition (depthplan.fitting.diffusion).

Every data set here is invented (seeded synthetic runs drawn from a known law), and named as
such; sources of the reference values are given beside each check.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from depthplan import fitting as F
from depthplan.records import RunResult

from fitting_data import power, synthetic_runs


def synthetic_probes(t0: float, drop_to: float = -20.0):
    """Invented probes: drift (D ~ t) until t0, diffusion (D ~ sqrt(t)) after; SNR a
    sigmoid in log-step from +20 dB to `drop_to` dB centred on t0."""
    steps = np.unique(np.geomspace(1, 100 * t0, 40).astype(int)).astype(float)
    disp = np.where(steps < t0, steps, np.sqrt(steps * t0))
    snr = drop_to + (20.0 - drop_to) / (1 + np.exp(3 * (np.log(steps) - math.log(t0))))
    return steps, disp, snr


def test_growth_exponent_of_random_walk_and_drift():
    # Feller, An Introduction to Probability Theory, vol. 1: the variance of a sum of
    # independent steps grows linearly, so ||W_t - W_0|| grows as t^(1/2); steady drift
    # grows as t^1. Invented walk in 400 dimensions.
    rng = np.random.default_rng(17)
    steps = np.unique(np.geomspace(1, 4000, 30).astype(int))
    walk = np.cumsum(rng.normal(size=(4000, 400)), axis=0)
    disp = np.linalg.norm(walk[steps - 1], axis=1)
    assert F.growth_exponent(steps, disp) == pytest.approx(0.5, abs=0.05)
    assert F.growth_exponent(steps, 0.01 * steps) == pytest.approx(1.0, abs=1e-9)
    assert math.isnan(F.growth_exponent([1, 2], [1.0, 2.0]))


def test_drift_then_diffusion_and_the_snr_drop():
    # Common practice (DESIGN.md section 3): weights grow about linearly, then about as
    # the square root of the step; the gradient SNR falls by roughly 40 dB (+20 to -20)
    # across the transition. Checked on invented probe curves of that shape.
    steps, disp, snr = synthetic_probes(300.0)
    t_tr = F.transition_step(steps, snr)
    assert t_tr == pytest.approx(300, rel=0.15)
    assert F.snr_drop_db(steps, snr) == pytest.approx(40, abs=3)
    assert F.growth_exponent(steps, disp, start=t_tr) == pytest.approx(0.5, abs=0.05)
    early = steps <= t_tr
    assert F.growth_exponent(steps[early], disp[early], late_fraction=1.0) == pytest.approx(1.0,
                                                                                          abs=0.05)
    flat = np.full_like(steps, 10.0)
    assert math.isnan(F.transition_step(steps, flat))


def test_diffusion_summary_sits_beside_alpha():
    rng = np.random.default_rng(18)
    steps, disp, snr = synthetic_probes(200.0)
    runs = [RunResult(**{**r.__dict__, "probe_steps": tuple(steps),
                         "displacement": (tuple(disp), tuple(1.5 * disp)),
                         "snr_db": (tuple(snr), tuple(snr))})
            for r in synthetic_runs(power(5000, -1.0), range(1, 7), 3, 0.1, rng)]
    fit = F.fit_runs(runs, n_boot=60)
    diff = fit["diffusion"]
    assert diff["n_runs"] == 18 and len(diff["layers"]) == 12
    assert diff["late_exponent_median"] == pytest.approx(0.5, abs=0.05)
    assert diff["snr_drop_db_median"] == pytest.approx(40, abs=3)
    assert diff["alpha"] == fit["power_law"]["alpha"]
    assert "Probes:" in F.format_summary(fit)

