"""Test reference: mean-field Gaussian variational inference over any log density.

Not part of jostle: :func:`jostle.fit_vi` takes a classifier and a data set (softmax
cross-entropy likelihood), so the closed forms of mean-field VI on a Gaussian target
(Bishop 2006, sec. 10.1.2) cannot be posed to it; this small fitter over an arbitrary log
density poses them, with the same ELBO estimator (reparameterised draws, std =
softplus(rho), jostle's shipped ``softplus_inverse``).

q(theta) = prod_i N(mean_i, std_i^2) with std = softplus(rho) (Blundell et al. 2015).
The fitter maximises the evidence lower bound
``E_q[log p(theta)] + sum_i log std_i + const`` with reparameterised draws
theta = mean + std * eps (the Gaussian entropy is in closed form). Minimising the
reverse KL this way keeps a Gaussian target's means and gives each coordinate the
variance 1 / Lambda_ii of the target's precision Lambda (Bishop 2006, sec. 10.1.2).
"""
from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import Tensor
from torch.nn import functional as F

from jostle.common.checks import as_float_tensor, check_float, check_int
from jostle.fitting.gaussians import softplus_inverse

__all__ = ["MeanFieldGaussian", "fit_mean_field"]


@dataclass
class MeanFieldGaussian:
    """A fitted fully factorised Gaussian.

    Attributes
    ----------
    mean, std : Tensor of shape (P,)
    elbo : list of float
        The evidence lower bound estimate (up to a constant) every step.
    """

    mean: Tensor
    std: Tensor
    elbo: list[float] = field(default_factory=list)

    @property
    def variance(self) -> Tensor:
        return self.std**2

    def sample(self, n: int, seed: int = 0) -> Tensor:
        """``n`` draws of shape (n, P), seeded."""
        n = check_int("n", n, low=1)
        generator = torch.Generator(device=self.mean.device).manual_seed(check_int("seed", seed, low=0))
        noise = torch.randn(n, *self.mean.shape, generator=generator, device=self.mean.device, dtype=self.mean.dtype)
        return self.mean + self.std * noise


def fit_mean_field(
    log_density: Callable[[Tensor], Tensor],
    initial: Any,
    *,
    steps: int = 2000,
    draws: int = 16,
    lr: float = 0.05,
    init_std: float = 0.1,
    batched: bool = True,
    seed: int = 0,
) -> MeanFieldGaussian:
    """Fit q(theta) = N(mean, diag(std^2)) to an unnormalised log density by maximising the ELBO.

    Parameters
    ----------
    log_density : callable
        With ``batched=True``: Tensor of shape (K, P) -> Tensor of shape (K,).
        With ``batched=False``: Tensor of shape (P,) -> scalar Tensor (called K times).
        Must be differentiable with torch.autograd.
    initial : array of shape (P,)
        Starting mean.
    steps : int
        Adam steps; the learning rate follows a cosine decay to 1% of ``lr`` so the
        last iterates settle instead of rattling with the Monte Carlo noise.
    draws : int
        Reparameterised draws K per step.
    lr, init_std : float
        Adam's starting learning rate; the starting standard deviation.
    seed : int

    Returns
    -------
    MeanFieldGaussian
    """
    mean = as_float_tensor("initial", initial, ndim=1, dtype=torch.float64 if _is_double(initial) else torch.float32)
    steps = check_int("steps", steps, low=1)
    draws = check_int("draws", draws, low=1)
    lr = check_float("lr", lr, low=0.0, low_open=True)
    init_std = check_float("init_std", init_std, low=0.0, low_open=True)
    generator = torch.Generator(device=mean.device).manual_seed(check_int("seed", seed, low=0))
    mean = mean.clone().requires_grad_(True)
    rho = softplus_inverse(torch.full_like(mean, init_std)).requires_grad_(True)
    optimiser = torch.optim.Adam([mean, rho], lr=lr)
    schedule = torch.optim.lr_scheduler.CosineAnnealingLR(optimiser, T_max=steps, eta_min=lr * 0.01)
    return _ascend(log_density, mean, rho, optimiser, schedule, steps, draws, batched, generator)


def _ascend(log_density, mean, rho, optimiser, schedule, steps, draws, batched, generator):
    elbo: list[float] = []
    for _ in range(steps):
        std = F.softplus(rho)
        noise = torch.randn(draws, *mean.shape, generator=generator, dtype=mean.dtype, device=mean.device)
        theta = mean + std * noise
        expected = _evaluate(log_density, theta, batched).mean()
        objective = expected + torch.log(std).sum()
        optimiser.zero_grad(set_to_none=True)
        (-objective).backward()
        optimiser.step()
        schedule.step()
        elbo.append(float(objective.detach()) + 0.5 * mean.numel() * (1 + math.log(2 * math.pi)))
    return MeanFieldGaussian(mean.detach(), F.softplus(rho).detach(), elbo)


def _evaluate(log_density: Callable[[Tensor], Tensor], theta: Tensor, batched: bool) -> Tensor:
    if batched:
        out = log_density(theta)
        if not isinstance(out, Tensor) or tuple(out.shape) != (theta.shape[0],):
            shape = tuple(out.shape) if isinstance(out, Tensor) else type(out).__name__
            raise ValueError(f"log_density must map (K, P) to shape ({theta.shape[0]},) when batched=True; "
                             f"got {shape}")
        return out
    values = []
    for row in theta:
        out = log_density(row)
        if not isinstance(out, Tensor) or out.numel() != 1:
            shape = tuple(out.shape) if isinstance(out, Tensor) else type(out).__name__
            raise ValueError(f"log_density must map (P,) to a scalar when batched=False; got {shape}")
        values.append(out.reshape(()))
    return torch.stack(values)


def _is_double(value: Any) -> bool:
    return getattr(value, "dtype", None) in (torch.float64, "float64") or str(getattr(value, "dtype", "")) == "float64"

