"""Test reference: a Laplace approximation over any log density, by Newton's method.

Not part of jostle: :func:`jostle.fit_laplace` is last-layer Laplace for a classifier
(softmax cross-entropy likelihood on a data set), so the Gaussian-likelihood closed form
(Bishop 2006, sec. 3.3.1: Laplace is exact for conjugate linear regression) cannot be
posed to it; this generic approximation poses it.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import torch
from torch import Tensor

from jostle.common.checks import as_float_tensor, check_float, check_int

__all__ = ["GaussianApproximation", "laplace_approximation"]


@dataclass(frozen=True)
class GaussianApproximation:
    """N(mean, covariance) with covariance = precision^-1; the log density at the mode."""

    mean: Tensor
    precision: Tensor
    log_density_at_mode: float
    iterations: int

    @property
    def covariance(self) -> Tensor:
        return torch.cholesky_inverse(torch.linalg.cholesky(self.precision))


def laplace_approximation(
    log_density: Callable[[Tensor], Tensor], initial: Any, *, max_iterations: int = 100, tolerance: float = 1e-10,
) -> GaussianApproximation:
    """Find the mode of ``log_density`` by Newton's method and take the Hessian there.

    Parameters
    ----------
    log_density : callable, Tensor of shape (P,) -> scalar Tensor
        Twice differentiable by torch.autograd; should be concave near its mode.
    initial : array of shape (P,)
        Starting point (float64 is used throughout).
    max_iterations : int
    tolerance : float
        Stop when the Newton step's norm falls below this.

    Returns
    -------
    GaussianApproximation
        ``precision`` is ``-hessian(log_density)`` at the mode (exact posterior
        precision for a Gaussian likelihood with a Gaussian prior).
    """
    theta = as_float_tensor("initial", initial, ndim=1, dtype=torch.float64).clone()
    max_iterations = check_int("max_iterations", max_iterations, low=1)
    tolerance = check_float("tolerance", tolerance, low=0.0, low_open=True)
    iterations = 0
    while iterations < max_iterations:
        iterations += 1
        point = theta.clone().requires_grad_(True)
        gradient = torch.autograd.grad(log_density(point), point)[0]
        precision = -torch.autograd.functional.hessian(log_density, theta)
        step = torch.linalg.solve(precision, gradient)
        theta = _damped(log_density, theta, step)
        if float(step.norm()) < tolerance:
            break
    precision = -torch.autograd.functional.hessian(log_density, theta)
    return GaussianApproximation(theta, precision, float(log_density(theta)), iterations)


def _damped(log_density, theta: Tensor, step: Tensor) -> Tensor:
    """theta + step, halved until the log density does not fall (Newton can overshoot)."""
    current = float(log_density(theta))
    for _ in range(30):
        candidate = theta + step
        if float(log_density(candidate)) >= current - 1e-12 * abs(current):
            return candidate
        step = step / 2
    return theta
