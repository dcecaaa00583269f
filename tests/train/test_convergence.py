"""The convergence counter, checked against gradient descent's closed form."""
from __future__ import annotations

import math

import numpy as np
import pytest

from depthplan.train.convergence import Criterion, updates_to_converge, verdict


def _gd_losses(lams: np.ndarray, e0: np.ndarray, eta: float, n_steps: int) -> list[float]:
    """Loss 0.5 * sum(lam_i * e_i^2) after 1..n_steps gradient-descent steps on a diagonal quadratic."""
    e, out = e0.copy(), []
    for _ in range(n_steps):
        e = e - eta * lams * e          # the gradient of the quadratic is lam * e
        out.append(float(0.5 * (lams * e * e).sum()))
    return out


@pytest.mark.parametrize("eta, eval_every", [(0.1, 1), (0.05, 5), (0.3, 20)])
def test_counter_matches_the_closed_form_of_gradient_descent(eta: float, eval_every: int) -> None:
    # Nesterov 2004, Introductory Lectures on Convex Optimization, sec. 2.1: on a quadratic with
    # curvature lam, gradient descent shrinks the error exactly by (1 - eta * lam) per step, so the
    # loss after t steps is 0.5 * sum(lam_i * (1 - eta*lam_i)^(2t) * e0_i^2).
    lams = np.array([1.0, 0.5, 0.2])
    e0 = np.array([1.0, -2.0, 0.5])
    tol = 1e-3
    t_exact = next(t for t in range(1, 100_000)
                   if 0.5 * (lams * (1 - eta * lams) ** (2 * t) * e0 ** 2).sum() < tol)
    expected = math.ceil(t_exact / eval_every) * eval_every      # T has the resolution of eval_every
    losses = _gd_losses(lams, e0, eta, 5000)[eval_every - 1::eval_every]
    t, status = updates_to_converge(losses, eval_every, 5000, Criterion(train_loss_below=tol))
    assert (t, status) == (expected, "converged")


def test_single_coordinate_has_a_logarithmic_count() -> None:
    # one coordinate: t* = ceil(log(tol / L0) / (2 log(1 - eta*lam)))  (same source as above)
    lam, eta, e0, tol = 1.0, 0.1, 1.0, 1e-4
    l0 = 0.5 * lam * e0 ** 2
    t_star = math.ceil(math.log(tol / l0) / (2 * math.log(1 - eta * lam)))
    losses = _gd_losses(np.array([lam]), np.array([e0]), eta, 1000)
    assert updates_to_converge(losses, 1, 1000, Criterion(train_loss_below=tol)) == (t_star, "converged")


def test_censored_and_diverged_runs() -> None:
    c = Criterion(train_loss_below=0.1)
    assert updates_to_converge([1.0, 0.9, 0.8], 10, 30, c) == (30, "censored")
    assert updates_to_converge([1.0, math.inf, 0.01], 10, 30, c) == (20, "diverged")
    assert updates_to_converge([1.0, math.nan], 10, 30, c) == (20, "diverged")


def test_all_conditions_must_hold() -> None:
    c = Criterion(train_loss_below=0.2, train_accuracy_at_least=0.95, validation_accuracy_at_least=0.9)
    assert c.needs_validation
    assert verdict(c, 10, 100, 0.1, 0.96, 0.91) == "converged"
    assert verdict(c, 10, 100, 0.1, 0.96, 0.85) is None
    assert verdict(c, 10, 100, 0.3, 0.99, 0.99) is None
    assert verdict(c, 100, 100, 0.3, 0.99, 0.99) == "censored"
    assert not Criterion().met(0.0, 1.0, 1.0)     # no condition given: never converged
