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

import torch
from torch import Tensor

from jostle.common.checks import check_float, check_has_values, check_int, show_value
from jostle.fitting.hmc.chains import run_chains
from jostle.fitting.hmc.transitions import (
    HMCDraws,
    HMCState,
    LogDensity,
    Settings,
    evaluate,
    hmc_transition,
    kinetic_energy,
    leapfrog,
)

__all__ = ["HMCState", "HMCDraws", "sample_hmc", "evaluate", "leapfrog", "hmc_transition", "kinetic_energy"]


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
    settings = Settings(
        trajectory_length=check_float("trajectory_length", trajectory_length, low=0.0, low_open=True),
        max_steps=check_int("max_steps", max_steps, low=1),
        jitter=check_float("jitter", jitter, low=0.0, high=1.0, high_open=True),
        target_accept=check_float("target_accept", target_accept, low=0.0, high=1.0, low_open=True, high_open=True),
        divergence_threshold=check_float("divergence_threshold", divergence_threshold, low=0.0, low_open=True),
    )
    if step_size is not None:
        step_size = check_float("step_size", step_size, low=0.0, low_open=True)
    if not callable(log_density):
        raise ValueError(f"log_density must be a callable mapping (C, P) to (C,); got {show_value(log_density)}")
    seed = check_int("seed", seed)

    return run_chains(
        log_density, initial, num_samples, warmup, settings, step_size,
        bool(adapt_mass), bool(diagnostics), seed, bool(progress),
    )



# ---------------------------------------------------------------------------- helpers
def _check_initial(initial) -> Tensor:
    if not isinstance(initial, Tensor):
        try:
            initial = torch.as_tensor(initial, dtype=torch.get_default_dtype())
        except (TypeError, ValueError, RuntimeError):
            raise ValueError(f"initial must be a tensor of shape (C, P); got {show_value(initial)}") from None
    if initial.ndim != 2 or initial.shape[0] < 1 or initial.shape[1] < 1:
        raise ValueError(f"initial must have shape (C, P) with C, P >= 1; got shape {tuple(initial.shape)}")
    if not initial.is_floating_point():
        raise ValueError(f"initial must be a floating tensor; got dtype {initial.dtype}")
    check_has_values("initial", initial)
    if not bool(torch.isfinite(initial).all()):
        raise ValueError("initial must contain only finite values; got NaN or inf")
    return initial.detach()
