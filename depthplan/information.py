"""Mutual information of a layer with the input and the label, by binning (numpy only).

The estimator of the information-plane probes (`probes.information`): a layer's activations on a
fixed batch are cut into equal-width bins over their range, each row's binned vector is one
symbol T, and the plug-in entropies of the symbol counts give

    I(X;T) = H(T)                 (T is a deterministic function of the input X), and
    I(T;Y) = H(T) + H(Y) - H(T, Y),

in bits. Binning estimates depend on the bin count: finer bins make more rows distinct, and once
every row of the batch is its own symbol, I(X;T) = log2(rows) and I(T;Y) = H(Y) whatever the
layer does (Saxe et al. 2018, ICLR, "On the information bottleneck theory of deep learning",
discuss how much such curves owe to the binning). Compare curves only at one bin count and batch.

Torch-free, so fitting and reporting may use it too.
"""
from __future__ import annotations

import numpy as np

__all__ = ["bin_codes", "row_symbols", "entropy_bits", "mutual_information_bits", "binned_information"]


def bin_codes(activations: np.ndarray, n_bins: int) -> np.ndarray:
    """Bin index 0 .. n_bins - 1 of every value, bins of equal width over [min, max] of all values.

    The maximum falls in the last bin; when every value is the same, all get bin 0.
    """
    if n_bins < 1:
        raise ValueError(f"n_bins must be at least 1, got {n_bins}")
    a = np.asarray(activations, dtype=np.float64)
    lo, hi = float(a.min()), float(a.max())
    if not hi > lo:
        return np.zeros(a.shape, dtype=np.int64)
    codes = np.floor((a - lo) / (hi - lo) * n_bins).astype(np.int64)
    return np.minimum(codes, n_bins - 1)


def row_symbols(codes: np.ndarray) -> np.ndarray:
    """(n_rows,) symbol ids 0, 1, ...: rows of `codes` (n_rows, ...) with equal entries share an id."""
    c = np.ascontiguousarray(np.asarray(codes).reshape(len(codes), -1))
    rows = c.view(np.dtype((np.void, c.dtype.itemsize * c.shape[1]))).ravel()
    return np.unique(rows, return_inverse=True)[1].ravel()


def entropy_bits(symbols: np.ndarray) -> float:
    """Plug-in entropy, in bits, of the empirical distribution of `symbols` (any hashable 1-D array)."""
    _, counts = np.unique(np.asarray(symbols), return_counts=True)
    p = counts / counts.sum()
    return float(-(p * np.log2(p)).sum())


def mutual_information_bits(a: np.ndarray, b: np.ndarray) -> float:
    """Plug-in mutual information I(A;B) = H(A) + H(B) - H(A,B), in bits, of paired symbols."""
    a_ids = np.unique(np.asarray(a), return_inverse=True)[1].ravel()
    b_ids = np.unique(np.asarray(b), return_inverse=True)[1].ravel()
    joint = a_ids * (int(b_ids.max()) + 1) + b_ids
    return max(0.0, entropy_bits(a_ids) + entropy_bits(b_ids) - entropy_bits(joint))


def binned_information(activations: np.ndarray, labels: np.ndarray, n_bins: int) -> tuple[float, float]:
    """(I(X;T), I(T;Y)) in bits of one layer on a fixed batch.

    Args:
        activations: (n_rows, n_units) the layer's outputs for the batch's inputs X.
        labels: (n_rows,) class labels Y of the same rows.
        n_bins: equal-width bins over the layer's activation range (`bin_codes`).
    """
    t = row_symbols(bin_codes(activations, n_bins))
    return entropy_bits(t), mutual_information_bits(t, labels)
