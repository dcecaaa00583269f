"""The text `depthplan fit` prints (depthplan.fitting.summary).

Every data set here is invented (seeded synthetic runs drawn from a known law), and named as
such; sources of the reference values are given beside each check.
"""
from __future__ import annotations


import numpy as np

from depthplan import fitting as F

from fitting_data import power, synthetic_runs


def test_summary_names_the_figures_and_the_proxy_caution():
    rng = np.random.default_rng(26)
    fit = F.fit_runs(synthetic_runs(power(5000, -1.0), range(1, 9), 4, 0.1, rng), n_boot=60)
    text = F.format_summary(fit)
    assert "Recommended depth: " in text
    assert f"s = {fit['power_law']['slope']:.2f}" in text
    assert "Alpha = " in text and "Reversal: beyond range" in text
    assert "proxy" in text

