"""Bayesian linear regression with its closed-form posterior (Bishop 2006, section 3.3).

Prior N(0, alpha^-1 I) on the weights of a straight line, Gaussian noise of precision beta,
20 seeded points: the posterior is N(m_N, S_N) with S_N^-1 = alpha I + beta Phi' Phi
(eq. 3.54) and m_N = beta S_N Phi' t (eq. 3.53).
"""
from __future__ import annotations

import torch

F64 = torch.float64


def regression_problem(device: str | torch.device = "cpu"):
    """``(log_density, m_N, S_N^-1)``; ``log_density`` takes rows of weights on ``device``."""
    generator = torch.Generator().manual_seed(0)
    x = torch.linspace(-1.0, 1.0, 20, dtype=F64)
    phi = torch.stack([torch.ones_like(x), x], 1)
    t = 0.3 - 0.7 * x + 0.2 * torch.randn(20, generator=generator, dtype=F64)
    alpha, beta = 2.0, 25.0
    precision = alpha * torch.eye(2, dtype=F64) + beta * phi.T @ phi      # S_N^-1, eq. 3.54
    mean = beta * torch.linalg.solve(precision, phi.T @ t)                 # m_N, eq. 3.53
    phi_d, t_d = phi.to(device), t.to(device)

    def log_density(w):
        residual = t_d - w @ phi_d.T
        return -0.5 * beta * (residual * residual).sum(-1) - 0.5 * alpha * (w * w).sum(-1)

    return log_density, mean, precision


def per_chain_moments(samples: torch.Tensor, centre: torch.Tensor):
    """Each chain's mean and second moment about ``centre`` (samples of shape (chains, draws,
    d)): independent across chains, so their spread over chains gives the Monte Carlo standard
    error of the pooled values."""
    means = samples.mean(1)
    d = samples - centre
    seconds = torch.einsum("cti,ctj->cij", d, d) / samples.shape[1]
    return means, seconds
