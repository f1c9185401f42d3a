"""Closed forms for factorised Gaussians used by the variational fit."""
from __future__ import annotations

import torch
from torch import Tensor

__all__ = ["gaussian_kl", "softplus_inverse"]


def gaussian_kl(mean_q: Tensor, std_q: Tensor, mean_p: Tensor | float, std_p: Tensor | float) -> Tensor:
    """Elementwise KL(N(mean_q, std_q^2) || N(mean_p, std_p^2)) in nats.

    ``log(std_p / std_q) + (std_q^2 + (mean_q - mean_p)^2) / (2 std_p^2) - 1/2``.

    Examples
    --------
    >>> round(float(gaussian_kl(torch.tensor(0.0), torch.tensor(1.0), 1.0, 2.0)), 6)
    0.443147
    """
    mean_p = torch.as_tensor(mean_p, dtype=mean_q.dtype, device=mean_q.device)
    std_p = torch.as_tensor(std_p, dtype=mean_q.dtype, device=mean_q.device)
    return torch.log(std_p / std_q) + (std_q**2 + (mean_q - mean_p) ** 2) / (2 * std_p**2) - 0.5


def softplus_inverse(std: Tensor | float) -> Tensor:
    """rho with softplus(rho) = std, stable for small and large std."""
    std = torch.as_tensor(std, dtype=torch.get_default_dtype()) if not isinstance(std, Tensor) else std
    return std + torch.log(-torch.expm1(-std))
