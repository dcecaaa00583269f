"""The binning estimator of the information probe against closed forms and scikit-learn.

Reference library: `sklearn.metrics.mutual_info_score`, the plug-in mutual information of two
label arrays in nats (divided by ln 2 here for bits). Closed forms (Cover and Thomas, Elements of
Information Theory, ch. 2): I(T;Y) = H(Y) when T = f(Y) for a bijection f; I(X;T) = H(T) when T
is a function of X; I(A;B) = 0 for a product distribution; refining a partition cannot lower H.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import entropy
from sklearn.metrics import mutual_info_score

from depthplan.information import (
    bin_codes,
    binned_information,
    entropy_bits,
    mutual_information_bits,
    row_symbols,
)

LN2 = math.log(2.0)


def test_a_bijective_relabelling_keeps_all_of_h_y() -> None:
    # Y with unequal class counts 5, 3, 2, 6 (16 rows); T = f(Y), f a bijection
    y = np.repeat([0, 1, 2, 3], [5, 3, 2, 6])
    t = np.array([7, 2, 9, 4])[y]
    h_y = float(entropy([5, 3, 2, 6], base=2))                 # scipy: -sum p log2 p
    assert entropy_bits(y) == pytest.approx(h_y, abs=1e-12)
    assert mutual_information_bits(t, y) == pytest.approx(h_y, abs=1e-12)
    assert mutual_information_bits(t, y) == pytest.approx(mutual_info_score(y, t) / LN2, abs=1e-12)


def test_a_function_of_x_carries_h_t_about_x() -> None:
    # X: 24 distinct inputs; T = x mod 5 (a function of X, not invertible)
    x = np.arange(24)
    t = x % 5
    counts = np.bincount(t)
    h_t = float(entropy(counts, base=2))
    assert mutual_information_bits(x, t) == pytest.approx(h_t, abs=1e-12)
    assert mutual_information_bits(x, t) == pytest.approx(mutual_info_score(x, t) / LN2, abs=1e-12)
    # the probe's own I(X;T): a layer whose binned output is t (one unit, values at bin centres)
    acts = ((t + 0.5) / 5.0)[:, None]            # five values over [0.1, 0.9]: one in each of 5 bins
    i_xt, i_ty = binned_information(acts, x % 2, n_bins=5)
    assert i_xt == pytest.approx(h_t, abs=1e-12)
    assert i_ty == pytest.approx(mutual_info_score(x % 2, t) / LN2, abs=1e-12)


def test_random_labels_match_scikit_learn_and_independence_gives_zero() -> None:
    rng = np.random.default_rng(4)
    a = rng.integers(0, 6, 500)
    b = (a + rng.integers(0, 3, 500)) % 4                        # dependent on a, noisily
    assert mutual_information_bits(a, b) == pytest.approx(mutual_info_score(a, b) / LN2, abs=1e-12)
    # a product distribution: every (a, b) pair of 3 x 4 values exactly once
    pa, pb = np.meshgrid(np.arange(3), np.arange(4))
    assert mutual_information_bits(pa.ravel(), pb.ravel()) == pytest.approx(0.0, abs=1e-12)


def test_rows_are_symbols_and_bins_span_the_layer_range() -> None:
    codes = np.array([[0, 1], [1, 0], [0, 1], [2, 2]])
    sym = row_symbols(codes)
    assert sym[0] == sym[2] and len(set(sym.tolist())) == 3      # equal rows share one symbol
    a = np.array([[-1.0, 0.0], [1.0, 0.49]])
    # range [-1, 1], 4 bins of width 0.5: -1 -> 0, 0 -> 2, 0.49 -> 2, the maximum 1 -> the last bin
    assert bin_codes(a, 4).tolist() == [[0, 2], [3, 2]]
    assert bin_codes(np.full((3, 2), 0.7), 30).max() == 0       # a constant layer: one bin
    with pytest.raises(ValueError):
        bin_codes(a, 0)


def test_finer_bins_never_lower_the_estimate() -> None:
    # Closed form: 30 equal bins over the same range refine 15 (each coarse bin is two fine ones),
    # and refining a partition cannot lower the entropy, so I(X;T) = H(T) cannot fall; the
    # estimate depends on the bin count (Saxe et al. 2018, ICLR, the binning caveat).
    rng = np.random.default_rng(9)
    acts = np.tanh(rng.standard_normal((400, 3)))
    y = rng.integers(0, 3, 400)
    coarse, fine = binned_information(acts, y, 15), binned_information(acts, y, 30)
    assert fine[0] >= coarse[0] - 1e-12
    assert fine[0] <= math.log2(400) + 1e-12                     # at most every row its own symbol
    assert 0.0 <= coarse[1] <= coarse[0] + 1e-12 and coarse[1] <= entropy_bits(y) + 1e-12
