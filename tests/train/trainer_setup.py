"""Settings the mlp trainer's tests share (test_stacked.py, test_cell.py, test_loop.py, test_reference.py)."""
from __future__ import annotations

import numpy as np

from depthplan.config import ConvergeConfig, ProbeConfig, TrainConfig

NO_PROBES = ProbeConfig(displacement=False, snr=False)
NEVER = ConvergeConfig(train_loss_below=1e-12)

OPTIMIZERS = {"sgd": dict(optimizer="sgd"), "momentum": dict(optimizer="sgd", momentum=0.9),
              "adam": dict(optimizer="adam")}
RATES = {"sgd": 0.05, "momentum": 0.01, "adam": 0.005}


def short_train(n_updates: int = 120, **kw) -> TrainConfig:
    """`n_updates` updates at rate 0.05, evaluated every 20, never converging unless told."""
    return TrainConfig(**{"learning_rate": (0.05,), "max_updates": n_updates, "eval_every": 20,
                          "converge_when": NEVER, **kw})


def curves(results) -> np.ndarray:
    """Every seed's training-loss curve, one row per seed."""
    return np.array([r.train_loss for r in results])
