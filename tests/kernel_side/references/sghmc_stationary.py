"""The exact stationary covariance of the discretised SGHMC / SGLD update on a Gaussian target.

On ``log p(x) = -x' Lambda x / 2`` the update of ``jostle.sample_sgmcmc`` at a fixed learning
rate ``eta`` and friction ``a`` is linear in each eigen-direction of ``Lambda`` (eigenvalue
``lam``): ``v' = (1 - a) v - eta lam x + xi``, ``x' = x + v'``, ``xi ~ N(0, 2 a eta)``. Its
stationary covariance solves the discrete Lyapunov equation ``S = A S A' + Q`` (scipy). This is
the step-size bias of the chain: 1 / lam exactly only in the limit eta -> 0.
"""
from __future__ import annotations

import numpy as np
import scipy.linalg


def stationary_variance(lam: float, eta: float, friction: float) -> float:
    """Stationary variance of x for one eigen-direction with precision ``lam``."""
    h, a = eta * lam, friction
    transition = np.array([[1.0 - h, 1.0 - a], [-h, 1.0 - a]])
    noise = 2.0 * a * eta * np.ones((2, 2))
    return float(scipy.linalg.solve_discrete_lyapunov(transition, noise)[0, 0])


def stationary_covariance(precision: np.ndarray, eta: float, friction: float) -> np.ndarray:
    """Stationary covariance of the chain on N(m, precision^-1) (any mean: the update is affine)."""
    lams, vectors = np.linalg.eigh(precision)
    variances = [stationary_variance(lam, eta, friction) for lam in lams]
    return vectors @ np.diag(variances) @ vectors.T
