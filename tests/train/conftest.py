"""Fixtures the training tests share."""
from __future__ import annotations

import pytest
import torch

from depthplan.config import DataConfig
from depthplan.train.datasets import load_dataset


@pytest.fixture
def one_thread():
    """Torch on one intra-op thread for the test (restored after): the plain reference loops, like
    the trainer, on one thread, because on a shared 2-core machine a second thread waits for a
    busy core and slows both loops many times."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


@pytest.fixture(scope="module")
def data():
    """The invented synthetic task the mlp trainer's tests train on: 400 rows, 12 features, 3 classes."""
    return load_dataset(DataConfig(source="synthetic", n_samples=400, n_features=12, n_classes=3))
