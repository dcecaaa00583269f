"""Each seed's minibatch order (BatchStream) and the fixed evaluation rows, shared by both trainers.

Shuffled epochs of full batches, each row once per epoch: common practice (sampling without
replacement, as torch's DataLoader with shuffle=True and drop_last=True does).
"""
from __future__ import annotations

import numpy as np
import torch

from depthplan.train.batches import BatchStream, eval_subset


def test_batch_stream_shuffles_whole_epochs() -> None:
    s = BatchStream(seed=3, n_rows=50, batch_size=8)
    rows = s.take(12)                     # 6 full batches per epoch (48 of 50 rows), two epochs
    assert rows.shape == (12, 8)
    for epoch in (rows[:6], rows[6:]):
        assert len(set(epoch.ravel().tolist())) == 48
    assert not np.array_equal(rows[:6], rows[6:])
    assert np.array_equal(BatchStream(3, 50, 8).take(12), rows)


def test_a_stream_read_in_pieces_is_the_stream_read_at_once() -> None:
    # the trainers take a block of steps at a time; the order must not depend on the block size
    whole = BatchStream(5, 30, 4).take(20)
    s = BatchStream(5, 30, 4)
    pieces = np.concatenate([s.take(3), s.take(1), s.take(9), s.take(7)])
    np.testing.assert_array_equal(pieces, whole)
    assert not np.array_equal(BatchStream(6, 30, 4).take(20), whole)       # another seed, another order


def test_a_batch_larger_than_the_set_is_the_whole_set_each_step() -> None:
    s = BatchStream(0, 5, 32)
    rows = s.take(3)
    assert s.batch == 5 and rows.shape == (3, 5)
    assert all(sorted(r.tolist()) == [0, 1, 2, 3, 4] for r in rows)      # full-batch gradient descent


def test_the_evaluation_subset_is_fixed() -> None:
    # the rows the training loss is scored on when train.eval_rows is set (private to batches.py,
    # which the trainers import it from under this name)
    n_rows = 320
    sub = eval_subset(n_rows, 50)
    assert len(sub) == 50 and len(set(sub.tolist())) == 50 and torch.equal(sub, eval_subset(n_rows, 50))
    assert eval_subset(n_rows, n_rows) is None and eval_subset(n_rows, None) is None
