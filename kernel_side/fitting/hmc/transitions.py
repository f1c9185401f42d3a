"""The pieces of HMC over C chains at once: state, one leapfrog trajectory, one transition, the draws."""
from __future__ import annotations

import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import NamedTuple

import torch
from torch import Tensor

from jostle.fitting.hmc.diagnostics import SamplingInterruptedWarning, chain_diagnostics

__all__ = ["HMCState", "HMCDraws", "Transition", "Settings", "LogDensity", "evaluate", "kinetic_energy", "leapfrog",
           "hmc_transition", "check_log_density_output", "summarise_draws", "warn_interrupted", "now"]

LogDensity = Callable[[Tensor], Tensor]


class HMCState(NamedTuple):
    """Where each chain is: position (C, P), log density (C,) and its gradient (C, P)."""

    position: Tensor
    log_density: Tensor
    grad: Tensor


class Transition(NamedTuple):
    """What one HMC iteration did, per chain (all tensors of shape (C,))."""

    state: HMCState
    accept_prob: Tensor
    accepted: Tensor
    divergent: Tensor
    energy_error: Tensor
    num_steps: Tensor


@dataclass(frozen=True)
class HMCDraws:
    """Draws and diagnostics from :func:`sample_hmc`.

    Attributes
    ----------
    samples : Tensor of shape (C, T, P)
        Post-warm-up positions of C chains (T draws each; fewer if interrupted).
    log_density : Tensor of shape (C, T)
    accept_prob : Tensor of shape (C, T)
        Metropolis acceptance probability min(1, exp(-dH)) of each iteration; 0 for a
        divergent one (always rejected).
    divergent : Tensor of shape (C, T), bool
    num_steps : Tensor of shape (C, T)
        Leapfrog steps taken in each iteration.
    accept_rate : Tensor of shape (C,)
        Mean acceptance probability after warm-up.
    divergences : Tensor of shape (C,)
        Divergent transitions after warm-up; ``warmup_divergences`` counts those before.
    step_size : Tensor of shape (C,)
        The adapted step size (before jitter): one value, shared by every chain and
        repeated C times.
    inverse_mass : Tensor of shape (C, P)
        Adapted diagonal inverse metric of each chain.
    rhat, ess, ess_tail : Tensor of shape (P,)
        Rank-normalised split R-hat and bulk / tail effective sample sizes (arviz, Vehtari
        et al. 2021) per coordinate; NaN if not computed or too few draws.
    gradient_evaluations : int
        Chain-gradient evaluations spent (one chain, one leapfrog step = 1).
    seconds : float
    interrupted : bool
        True when sampling was stopped by KeyboardInterrupt and these are the draws so far.
    """

    samples: Tensor
    log_density: Tensor
    accept_prob: Tensor
    divergent: Tensor
    num_steps: Tensor
    accept_rate: Tensor
    divergences: Tensor
    warmup_divergences: Tensor
    step_size: Tensor
    inverse_mass: Tensor
    rhat: Tensor
    ess: Tensor
    ess_tail: Tensor
    gradient_evaluations: int
    seconds: float
    interrupted: bool

    @property
    def num_chains(self) -> int:
        return int(self.samples.shape[0])

    @property
    def num_draws(self) -> int:
        """Draws per chain."""
        return int(self.samples.shape[1])


@dataclass(frozen=True)
class Settings:
    trajectory_length: float
    max_steps: int
    jitter: float
    target_accept: float
    divergence_threshold: float


def evaluate(log_density: LogDensity, position: Tensor) -> HMCState:
    """Log density and gradient for every chain from one backward pass.

    A chain whose density or gradient is not finite gets log density -inf and a zero
    gradient, so no NaN travels further.
    """
    with torch.enable_grad():
        q = position.detach().requires_grad_(True)
        value = log_density(q)
        check_log_density_output(value, q)
        (grad,) = torch.autograd.grad(value.sum(), q)
    value = value.detach()
    bad = ~(torch.isfinite(value) & torch.isfinite(grad).all(-1))
    if bool(bad.any()):
        value = torch.where(bad, torch.full_like(value, -float("inf")), value)
        grad = torch.where(bad[:, None], torch.zeros_like(grad), grad)
    return HMCState(position.detach(), value, grad)


def kinetic_energy(momentum: Tensor, inverse_mass: Tensor) -> Tensor:
    """``p' M^-1 p / 2`` per chain for a diagonal metric: (C, P) -> (C,)."""
    return 0.5 * (momentum * momentum * inverse_mass).sum(-1)


def leapfrog(
    log_density: LogDensity,
    state: HMCState,
    momentum: Tensor,
    step_size: Tensor,
    num_steps: Tensor | int,
    inverse_mass: Tensor,
) -> tuple[HMCState, Tensor]:
    """Integrate Hamilton's equations with the leapfrog scheme, each chain on its own clock.

    Parameters
    ----------
    state : HMCState
        Start of the trajectory (C chains, P coordinates).
    momentum : Tensor of shape (C, P)
    step_size : Tensor of shape (C,)
    num_steps : int or Tensor of shape (C,)
        Chains with fewer steps stop early while the others carry on.
    inverse_mass : Tensor of shape (C, P) or (P,)
        Diagonal of M^-1.

    Returns
    -------
    (HMCState, Tensor of shape (C, P))
        End state and momentum. A chain that reached a non-finite density stops there with
        log density -inf (its end point must be rejected).
    """
    chains = state.position.shape[0]
    steps = torch.as_tensor(num_steps, device=state.position.device).expand(chains)
    eps = step_size.to(state.position).reshape(chains, 1)
    q, value, grad = state
    p = momentum + 0.5 * eps * grad
    alive = torch.isfinite(value)
    for k in range(int(steps.max())):
        moving = alive & (k < steps)
        q = torch.where(moving[:, None], q + eps * inverse_mass * p, q)
        new = evaluate(log_density, q)
        value = torch.where(moving, new.log_density, value)
        grad = torch.where(moving[:, None], new.grad, grad)
        alive = alive & torch.isfinite(value)
        # The last step of each chain closes with a half step of momentum.
        kick = torch.where(steps - 1 == k, 0.5, 1.0).to(q) * (moving & alive).to(q)
        p = p + (kick[:, None] * eps) * grad
    return HMCState(q, value, grad), p


def hmc_transition(
    log_density: LogDensity,
    state: HMCState,
    step_size: Tensor,
    num_steps: Tensor,
    inverse_mass: Tensor,
    generator: torch.Generator,
    divergence_threshold: float = 1000.0,
) -> Transition:
    """One HMC iteration per chain: fresh momentum, a leapfrog trajectory, accept or reject.

    A transition is divergent when its energy error is not finite or exceeds
    ``divergence_threshold``; divergent transitions are always rejected (acceptance
    probability 0), whatever the threshold. Rejected proposals leave the chain where it was.
    """
    like = state.position
    noise = torch.randn(like.shape, generator=generator, dtype=like.dtype).to(like.device)
    momentum = noise / inverse_mass.sqrt()
    start_energy = -state.log_density + kinetic_energy(momentum, inverse_mass)
    end, end_momentum = leapfrog(log_density, state, momentum, step_size, num_steps, inverse_mass)
    energy_error = -end.log_density + kinetic_energy(end_momentum, inverse_mass) - start_energy
    finite = torch.isfinite(energy_error)
    energy_error = torch.where(finite, energy_error, torch.full_like(energy_error, float("inf")))
    divergent = ~finite | (energy_error > divergence_threshold)
    # A divergent transition is always rejected, so its acceptance probability is 0.
    metropolis = torch.exp(torch.clamp(-energy_error, max=0.0))
    accept_prob = torch.where(divergent, torch.zeros_like(metropolis), metropolis)
    uniform = torch.rand(like.shape[0], generator=generator, dtype=like.dtype).to(like.device)
    accepted = (uniform < accept_prob) & ~divergent
    new_state = HMCState(
        torch.where(accepted[:, None], end.position, state.position),
        torch.where(accepted, end.log_density, state.log_density),
        torch.where(accepted[:, None], end.grad, state.grad),
    )
    return Transition(new_state, accept_prob, accepted, divergent, energy_error, num_steps)



def check_log_density_output(value, q: Tensor) -> None:
    chains = q.shape[0]
    if not isinstance(value, Tensor) or tuple(value.shape) != (chains,):
        shape = tuple(value.shape) if isinstance(value, Tensor) else type(value).__name__
        raise ValueError(f"log_density must return a tensor of shape ({chains},) for input ({chains}, P); got {shape}")
    if not value.requires_grad:
        raise ValueError(
            "log_density must be differentiable in its input with torch.autograd; "
            "got an output with no autograd graph"
        )


def summarise_draws(samples: Tensor, enabled: bool) -> tuple[Tensor, Tensor, Tensor]:
    chains, draws, dims = samples.shape
    if not enabled or draws < 4:
        nan = torch.full((dims,), float("nan"), dtype=torch.float64)
        return nan, nan.clone(), nan.clone()
    found = chain_diagnostics(samples.detach().cpu().double().numpy())
    return tuple(torch.as_tensor(found[key]) for key in ("rhat", "ess_bulk", "ess_tail"))


def warn_interrupted(kept: int, wanted: int) -> None:
    warnings.warn(
        f"sampling interrupted: returning the {kept} of {wanted} draws per chain collected so far",
        SamplingInterruptedWarning,
        stacklevel=4,
    )


def now() -> float:
    return time.perf_counter()
