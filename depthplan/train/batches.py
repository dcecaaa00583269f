"""What every family's trainer shares: each seed's minibatch order and a cell's data as tensors.

Kept apart from the trainers (`loop.py` for the mlp family, `functional.py` for the others) so
that both read the same batch order and evaluation rows, and neither imports the other.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F

from .datasets import Dataset


class BatchStream:
    """One seed's minibatch order: shuffled epochs of the training set, full batches only."""

    def __init__(self, seed: int, n_rows: int, batch_size: int, salt: int = 0xBA7C4) -> None:
        self.rng = np.random.default_rng([int(seed), salt])
        self.n_rows = n_rows
        self.batch = min(batch_size, n_rows)
        self.per_epoch = (n_rows // self.batch) * self.batch
        self.buf = np.empty(0, dtype=np.int64)

    def take(self, n_steps: int) -> np.ndarray:
        """Row indices of the next `n_steps` minibatches, shape (n_steps, batch)."""
        need = n_steps * self.batch
        parts = [self.buf]
        have = len(self.buf)
        while have < need:
            perm = self.rng.permutation(self.n_rows)[: self.per_epoch]
            parts.append(perm)
            have += len(perm)
        buf = np.concatenate(parts)
        self.buf = buf[need:]
        return buf[:need].reshape(n_steps, self.batch)


def eval_subset(n_rows: int, eval_rows: int | None) -> torch.Tensor | None:
    """Row indices of the fixed evaluation subset, or None for all rows."""
    if eval_rows is None or eval_rows >= n_rows:
        return None
    rng = np.random.default_rng(0xE7A1)
    return torch.from_numpy(np.sort(rng.choice(n_rows, size=eval_rows, replace=False)))


@dataclass
class CellTensors:
    """A cell's data as tensors: training set with one-hot targets, evaluation rows, validation set,
    and the fixed batch of the information probe."""

    x: torch.Tensor
    onehot: torch.Tensor
    x_eval: torch.Tensor
    y_eval: torch.Tensor
    x_val: torch.Tensor
    y_val: torch.Tensor
    x_info: torch.Tensor
    y_info: np.ndarray


#: Rows of the information probe's fixed batch (at most): enough for the binned entropies of a
#: few classes, few enough that the binning stays cheap.
INFORMATION_ROWS = 1000


def cell_tensors(data: Dataset, dtype: torch.dtype, eval_rows: int | None) -> CellTensors:
    """The task's arrays as tensors of `dtype`, with the fixed evaluation subset picked out."""
    x = torch.from_numpy(data.x_train).to(dtype)
    y = torch.from_numpy(data.y_train)
    x_val = torch.from_numpy(data.x_val).to(dtype)
    y_val = torch.from_numpy(data.y_val)
    onehot = F.one_hot(y, data.n_classes).to(dtype)
    subset = eval_subset(x.shape[0], eval_rows)
    x_eval, y_eval = (x, y) if subset is None else (x[subset], y[subset])
    info = eval_subset(x.shape[0], INFORMATION_ROWS)
    x_info, y_info = (x, y) if info is None else (x[info], y[info])
    return CellTensors(x, onehot, x_eval, y_eval, x_val, y_val, x_info, y_info.numpy())
