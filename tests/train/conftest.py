"""Fixtures the training tests share."""
from __future__ import annotations

import pytest
import torch


@pytest.fixture
def one_thread():
    """Torch on one intra-op thread for the test (restored after): the plain reference loops, like
    the trainer, on one thread, because on a shared 2-core machine a second thread waits for a
    busy core and slows both loops many times."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)
