"""Shared fixtures: tiny sweep files and result folders in tmp paths."""
from __future__ import annotations

import textwrap
from pathlib import Path

import pytest

TINY = """
name: tiny
data:
  source: digits
model:
  width: 8
sweep:
  depths: [1, 2]
  seeds: 2
train:
  learning_rate: 0.05
  max_updates: 60
  eval_every: 20
  converge_when:
    train_loss_below: 0.5
probes:
  n_points: 6
  snr_window: 4
"""


@pytest.fixture
def write_yaml(tmp_path: Path):
    """Write YAML text (dedented) to a file in tmp_path and return its path."""
    def write(text: str, name: str = "sweep.yaml") -> Path:
        p = tmp_path / name
        p.write_text(textwrap.dedent(text))
        return p
    return write


@pytest.fixture
def tiny_config(write_yaml) -> Path:
    return write_yaml(TINY)
