"""Hamiltonian Monte Carlo over C chains at once, with warm-up adaptation and diagnostics.

The sampler is built from small pure functions over tensors and a named-tuple state:
:func:`evaluate` (log density and its gradient for every chain in one backward pass),
:func:`leapfrog` (a trajectory per chain, each with its own step size and step count)
and :func:`hmc_transition` (momentum, trajectory, Metropolis correction).
:func:`sample_hmc` strings them together with dual averaging of one step size shared
by every chain and adapted on their pooled acceptance (Hoffman & Gelman 2014,
Algorithm 5; each iteration jitters it per chain), and a diagonal inverse metric per
chain estimated in expanding warm-up windows.
"""
from __future__ import annotations

import time
import warnings
from dataclasses import dataclass
from typing import Callable, NamedTuple

import torch
from torch import Tensor

import jostle.fitting.hmc.adaptation as adapt
from jostle.common.checks import _show, check_float, check_has_values, check_int
from jostle.fitting.hmc.diagnostics import SamplingInterruptedWarning, chain_diagnostics

__all__ = ["HMCState", "HMCDraws", "sample_hmc", "evaluate", "leapfrog", "hmc_transition", "kinetic_energy"]

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


def sample_hmc(
    log_density: LogDensity,
    initial: Tensor,
    num_samples: int = 1000,
    warmup: int = 1000,
    *,
    trajectory_length: float = 2.0,
    max_steps: int = 256,
    jitter: float = 0.2,
    target_accept: float = 0.8,
    step_size: float | None = None,
    adapt_mass: bool = True,
    divergence_threshold: float = 1000.0,
    diagnostics: bool = True,
    seed: int = 0,
    progress: bool = False,
) -> HMCDraws:
    """Draw from ``exp(log_density)`` with C independent HMC chains advanced together.

    Parameters
    ----------
    log_density : callable, Tensor (C, P) -> Tensor (C,)
        Unnormalised log density of each row. Must be differentiable with torch.autograd;
        rows must not interact (one backward pass then gives every chain's gradient).
        Non-finite values mark forbidden regions: a trajectory reaching one is a
        rejected, counted divergence.
    initial : Tensor of shape (C, P)
        Starting positions, one row per chain; its dtype and device are used throughout.
    num_samples : int
        Draws kept per chain after warm-up.
    warmup : int
        Adaptation iterations per chain (discarded).
    trajectory_length : float
        Integration time per iteration; each iteration takes
        ``ceil(trajectory_length / step)`` leapfrog steps (at most ``max_steps``).
    max_steps : int
        Cap on leapfrog steps per iteration.
    jitter : float in [0, 1)
        Each iteration multiplies the step size by a uniform draw from [1 - jitter, 1 + jitter].
    target_accept : float in (0, 1)
        Mean acceptance probability that dual averaging aims for. The chains share one
        step size, adapted on their pooled acceptance; each has its own metric.
    step_size : float, optional
        Initial step size; default found by the doubling heuristic (Hoffman & Gelman 2014,
        Algorithm 4). With ``warmup=0`` it is used as is.
    adapt_mass : bool
        Estimate each chain's diagonal inverse metric in expanding warm-up windows (else
        identity). Needs ``warmup >= 150``; shorter warm-ups adapt the step size only.
    divergence_threshold : float
        An energy error above this (or a non-finite one) counts as a divergence, and a
        divergent transition is always rejected. Keep it large: rejecting a proposal
        whose reverse move would be accepted breaks detailed balance, so a small threshold
        biases the draws. At the default, a divergence's Metropolis probability
        ``exp(-1000)`` already underflows to 0, and rejecting it changes nothing.
    diagnostics : bool
        Compute arviz R-hat and bulk / tail ESS per coordinate (costly for large P).
    seed : int
        Seeds this call's own ``torch.Generator``; the global RNG is untouched.
    progress : bool
        Show one tqdm progress bar with the phase, acceptance rate and divergences.

    Returns
    -------
    HMCDraws

    Raises
    ------
    ValueError
        On a malformed argument, or when ``log_density`` returns the wrong shape, is not
        differentiable, or is not finite at ``initial``.

    Examples
    --------
    >>> draws = sample_hmc(lambda q: -0.5 * (q ** 2).sum(-1), torch.zeros(4, 2),
    ...                    num_samples=50, warmup=50, diagnostics=False)
    >>> draws.samples.shape
    torch.Size([4, 50, 2])
    """
    initial = _check_initial(initial)
    num_samples = check_int("num_samples", num_samples, low=1)
    warmup = check_int("warmup", warmup, low=0)
    settings = _Settings(
        trajectory_length=check_float("trajectory_length", trajectory_length, low=0.0, low_open=True),
        max_steps=check_int("max_steps", max_steps, low=1),
        jitter=check_float("jitter", jitter, low=0.0, high=1.0, high_open=True),
        target_accept=check_float("target_accept", target_accept, low=0.0, high=1.0, low_open=True, high_open=True),
        divergence_threshold=check_float("divergence_threshold", divergence_threshold, low=0.0, low_open=True),
    )
    if step_size is not None:
        step_size = check_float("step_size", step_size, low=0.0, low_open=True)
    if not callable(log_density):
        raise ValueError(f"log_density must be a callable mapping (C, P) to (C,); got {_show(log_density)}")
    seed = check_int("seed", seed)
    from jostle.fitting.hmc.leapfrog_loop import run_chains

    return run_chains(
        log_density, initial, num_samples, warmup, settings, step_size,
        bool(adapt_mass), bool(diagnostics), seed, bool(progress),
    )


@dataclass(frozen=True)
class _Settings:
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
        _check_output(value, q)
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


# ---------------------------------------------------------------------------- helpers
def _check_initial(initial) -> Tensor:
    if not isinstance(initial, Tensor):
        try:
            initial = torch.as_tensor(initial, dtype=torch.get_default_dtype())
        except (TypeError, ValueError, RuntimeError):
            raise ValueError(f"initial must be a tensor of shape (C, P); got {_show(initial)}") from None
    if initial.ndim != 2 or initial.shape[0] < 1 or initial.shape[1] < 1:
        raise ValueError(f"initial must have shape (C, P) with C, P >= 1; got shape {tuple(initial.shape)}")
    if not initial.is_floating_point():
        raise ValueError(f"initial must be a floating tensor; got dtype {initial.dtype}")
    check_has_values("initial", initial)
    if not bool(torch.isfinite(initial).all()):
        raise ValueError("initial must contain only finite values; got NaN or inf")
    return initial.detach()


def _check_output(value, q: Tensor) -> None:
    chains = q.shape[0]
    if not isinstance(value, Tensor) or tuple(value.shape) != (chains,):
        shape = tuple(value.shape) if isinstance(value, Tensor) else type(value).__name__
        raise ValueError(f"log_density must return a tensor of shape ({chains},) for input ({chains}, P); got {shape}")
    if not value.requires_grad:
        raise ValueError(
            "log_density must be differentiable in its input with torch.autograd; "
            "got an output with no autograd graph"
        )


def _summarise(samples: Tensor, enabled: bool) -> tuple[Tensor, Tensor, Tensor]:
    chains, draws, dims = samples.shape
    if not enabled or draws < 4:
        nan = torch.full((dims,), float("nan"), dtype=torch.float64)
        return nan, nan.clone(), nan.clone()
    found = chain_diagnostics(samples.detach().cpu().double().numpy())
    return tuple(torch.as_tensor(found[key]) for key in ("rhat", "ess_bulk", "ess_tail"))


def _warn_interrupted(kept: int, wanted: int) -> None:
    warnings.warn(
        f"sampling interrupted: returning the {kept} of {wanted} draws per chain collected so far",
        SamplingInterruptedWarning,
        stacklevel=4,
    )


def _now() -> float:
    return time.perf_counter()
