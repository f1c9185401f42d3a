"""The warm-up and sampling loop behind :func:`jostle.sample_hmc`."""
from __future__ import annotations

import torch
from torch import Tensor

import jostle.fitting.hmc.adaptation as adapt
from jostle.common.progress import progress_bar
from jostle.fitting.hmc.transitions import (
    HMCDraws,
    HMCState,
    LogDensity,
    Settings,
    evaluate,
    hmc_transition,
    kinetic_energy,
    leapfrog,
    now,
    summarise_draws,
    warn_interrupted,
)

_HEURISTIC_ROUNDS = 60
_STEP_LIMITS = (1e-12, 1e6)


def run_chains(
    log_density: LogDensity,
    initial: Tensor,
    num_samples: int,
    warmup: int,
    settings: Settings,
    step_size: float | None,
    adapt_mass: bool,
    diagnostics: bool,
    seed: int,
    progress: bool,
) -> HMCDraws:
    started = now()
    generator = torch.Generator().manual_seed(seed)
    state = evaluate(log_density, initial)
    bad = (~torch.isfinite(state.log_density)).nonzero().flatten().tolist()
    if bad:
        raise ValueError(
            f"initial must give a finite log density and gradient for every chain; chains {bad} do not"
        )
    run = _Run(log_density, state, settings, generator, num_samples)
    # miniters=1: iterations slow down sharply as the step size adapts, and a dynamic
    # minimum would leave the bar frozen for minutes.
    bar = progress_bar(bool(progress), warmup + num_samples, "HMC", unit="it", leave=True, miniters=1,
                       mininterval=0.5)
    interrupted = False
    try:
        run.start_step(step_size)
        run.warm_up(warmup, adapt.warmup_windows(warmup) if adapt_mass else [], bar)
        run.sample(bar)
    except KeyboardInterrupt:
        interrupted = True
        warn_interrupted(run.kept, num_samples)
    finally:
        bar.close()
    return run.result(diagnostics, interrupted, now() - started)


class _Run:
    """Mutable bookkeeping of one sampling run (the numerics live in pure functions)."""

    def __init__(self, log_density, state: HMCState, settings: Settings, generator, num_samples: int):
        self.log_density = log_density
        self.state = state
        self.settings = settings
        self.generator = generator
        chains, dims = state.position.shape
        self.inverse_mass = torch.ones_like(state.position)
        self.samples = state.position.new_empty((chains, num_samples, dims))
        self.stats = {
            "log_density": torch.empty(chains, num_samples, dtype=torch.float64),
            "accept_prob": torch.empty(chains, num_samples, dtype=torch.float64),
            "divergent": torch.zeros(chains, num_samples, dtype=torch.bool),
            "num_steps": torch.zeros(chains, num_samples, dtype=torch.long),
        }
        self.kept = 0
        self.warmup_divergences = torch.zeros(chains, dtype=torch.long)
        self.gradient_evaluations = 0
        self.chains = chains
        # One step size shared by every chain (shape (1,)); each chain has its own metric.
        self.step = torch.ones(1, dtype=torch.float64)

    def start_step(self, step_size: float | None) -> None:
        if step_size is not None:
            self.step = torch.full_like(self.step, step_size)
        else:
            self.step = self.find_step_size(torch.ones_like(self.step))

    def shared(self, per_chain: Tensor) -> Tensor:
        return per_chain.log().mean(0, keepdim=True).exp()

    def find_step_size(self, start: Tensor) -> Tensor:
        """Hoffman & Gelman 2014, Algorithm 4, run per chain (double or halve until the
        acceptance probability of one leapfrog step crosses 1/2); the shared step returned,
        shape (1,), is the geometric mean of the chains' steps."""
        like = self.state.position
        noise = torch.randn(like.shape, generator=self.generator, dtype=like.dtype).to(like.device)
        momentum = noise / self.inverse_mass.sqrt()
        start_energy = -self.state.log_density + kinetic_energy(momentum, self.inverse_mass)

        def log_ratio(step: Tensor) -> Tensor:
            end, p = leapfrog(self.log_density, self.state, momentum, step, 1, self.inverse_mass)
            self.gradient_evaluations += step.numel()
            value = (start_energy + end.log_density - kinetic_energy(p, self.inverse_mass)).double().cpu()
            return torch.nan_to_num(value, nan=-float("inf"))

        step = start.expand(self.chains).clone()
        ratio = log_ratio(step)
        direction = torch.where(ratio > adapt.LOG_HALF, 1.0, -1.0).double()
        active = torch.ones_like(step, dtype=torch.bool)
        for _ in range(_HEURISTIC_ROUNDS):
            inside = (step > _STEP_LIMITS[0]) & (step < _STEP_LIMITS[1])
            active = active & (direction * ratio > direction * adapt.LOG_HALF) & inside
            if not bool(active.any()):
                break
            step = torch.where(active, step * 2.0 ** direction, step)
            ratio = torch.where(active, log_ratio(step), ratio)
        return self.shared(step.clamp(*_STEP_LIMITS))

    def iterate(self, step: Tensor):
        settings = self.settings
        # Each chain jitters its own step and takes ceil(length / step) leapfrog steps;
        # drawing the jitter per chain keeps the pooled acceptance statistic smooth.
        jittered = step * adapt.jitter_factors(self.chains, settings.jitter, self.generator)
        steps = adapt.steps_for(settings.trajectory_length, jittered, settings.max_steps)
        move = hmc_transition(
            self.log_density, self.state, jittered, steps.to(self.state.position.device),
            self.inverse_mass, self.generator, settings.divergence_threshold,
        )
        self.state = move.state
        self.gradient_evaluations += int(steps.sum())
        return move

    def warm_up(self, warmup: int, windows: list[tuple[int, int]], bar) -> None:
        averaging = adapt.dual_averaging_start(self.step)
        ends = {end for _, end in windows}
        first = windows[0][0] if windows else warmup
        variance = adapt.running_variance_start(self.state.position)
        accept_sum = 0.0
        for i in range(warmup):
            move = self.iterate(averaging.log_step.exp())
            accept = move.accept_prob.double().cpu()
            # Pooling the chains' acceptance cuts the noise that otherwise biases the
            # averaged step (the realised acceptance then overshoots the target).
            averaging = adapt.dual_averaging_update(
                averaging, accept.mean(0, keepdim=True), self.settings.target_accept
            )
            self.warmup_divergences += move.divergent.cpu().long()
            if i >= first and windows:
                variance = adapt.running_variance_update(variance, self.state.position)
            if i + 1 in ends:
                self.inverse_mass = adapt.regularised_variance(variance)
                variance = adapt.running_variance_start(self.state.position)
                averaging = adapt.dual_averaging_start(self.find_step_size(averaging.log_step.exp()))
            accept_sum += float(accept.mean())
            _tick(bar, "warm-up", accept_sum / (i + 1), self.warmup_divergences)
        if warmup:
            settled = averaging.log_step_avg.exp()
            self.step = torch.where(averaging.count > 0, settled, averaging.log_step.exp())

    def sample(self, bar) -> None:
        total = self.samples.shape[1]
        divergences = torch.zeros_like(self.warmup_divergences)
        for t in range(total):
            move = self.iterate(self.step)
            self.samples[:, t] = self.state.position
            self.stats["log_density"][:, t] = self.state.log_density.double().cpu()
            self.stats["accept_prob"][:, t] = move.accept_prob.double().cpu()
            self.stats["divergent"][:, t] = move.divergent.cpu()
            self.stats["num_steps"][:, t] = move.num_steps.cpu()
            self.kept = t + 1
            divergences += move.divergent.cpu().long()
            _tick(bar, "sampling", float(self.stats["accept_prob"][:, : t + 1].mean()), divergences)

    def result(self, diagnostics: bool, interrupted: bool, seconds: float) -> HMCDraws:
        kept = self.kept
        samples = self.samples[:, :kept]
        stats = {name: value[:, :kept] for name, value in self.stats.items()}
        rhat, ess, ess_tail = summarise_draws(samples, diagnostics)
        if kept:
            accept_rate = stats["accept_prob"].mean(1)
        else:
            accept_rate = torch.full((self.chains,), float("nan"), dtype=torch.float64)
        return HMCDraws(
            samples=samples,
            log_density=stats["log_density"],
            accept_prob=stats["accept_prob"],
            divergent=stats["divergent"],
            num_steps=stats["num_steps"],
            accept_rate=accept_rate,
            divergences=stats["divergent"].sum(1),
            warmup_divergences=self.warmup_divergences,
            step_size=self.step.expand(self.chains).clone(),
            inverse_mass=self.inverse_mass,
            rhat=rhat,
            ess=ess,
            ess_tail=ess_tail,
            gradient_evaluations=self.gradient_evaluations,
            seconds=seconds,
            interrupted=interrupted,
        )


def _tick(bar, phase: str, accept: float, divergences: Tensor) -> None:
    if bar.disable:  # skip the device sync of reading the divergence count
        return
    bar.set_postfix(phase=phase, accept=f"{accept:.2f}", divergences=int(divergences.sum()), refresh=False)
    bar.update(1)
