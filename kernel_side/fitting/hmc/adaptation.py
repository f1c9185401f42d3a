"""Warm-up adaptation for HMC: dual averaging of the step size and windowed mass estimates.

The sampling loop adapts one step size shared by every chain, on the chains' pooled
acceptance (the dual-averaging state then has shape (1,)); each chain estimates its own
diagonal inverse metric, so chains that settle in different modes keep their own scales.
The functions here are elementwise and work for any leading shape.
"""
from __future__ import annotations

import math
from typing import NamedTuple

import torch
from torch import Tensor

# Hoffman & Gelman 2014 (JMLR 15), Algorithm 5 constants.
DA_GAMMA = 0.05
DA_T0 = 10.0
DA_KAPPA = 0.75

# Warm-up windows in the usual expanding layout (common practice): a fast buffer for the
# step size alone, slow windows that double in length for the mass matrix, and a final
# fast buffer that tunes the step size to the last metric.
_INIT_BUFFER = 75
_TERM_BUFFER = 50
_BASE_WINDOW = 25


class DualAveraging(NamedTuple):
    """State of Hoffman & Gelman's dual averaging, tensors of one shape: (1,) for the shared step."""

    log_step: Tensor
    log_step_avg: Tensor
    h_avg: Tensor
    count: Tensor
    mu: Tensor


def dual_averaging_start(step_size: Tensor) -> DualAveraging:
    """Restart dual averaging around ``step_size`` with ``mu = log(10 * step_size)``."""
    zeros = torch.zeros_like(step_size)
    return DualAveraging(step_size.log(), zeros.clone(), zeros.clone(), zeros.clone(), (10.0 * step_size).log())


def dual_averaging_update(state: DualAveraging, accept_prob: Tensor, target: float) -> DualAveraging:
    """One update of Algorithm 5 given this iteration's acceptance statistic, shaped like the
    state (the loop passes the chains' mean acceptance probability, shape (1,))."""
    accept_prob = torch.nan_to_num(accept_prob, nan=0.0).clamp(0.0, 1.0)
    count = state.count + 1
    eta = 1.0 / (count + DA_T0)
    h_avg = (1.0 - eta) * state.h_avg + eta * (target - accept_prob)
    log_step = state.mu - count.sqrt() / DA_GAMMA * h_avg
    weight = count.pow(-DA_KAPPA)
    log_step_avg = weight * log_step + (1.0 - weight) * state.log_step_avg
    return DualAveraging(log_step, log_step_avg, h_avg, count, state.mu)


def warmup_windows(warmup: int) -> list[tuple[int, int]]:
    """Slow warm-up windows ``(start, end)`` (0-based, end exclusive) for the mass matrix.

    Follows the expanding-window layout: 75 fast iterations, slow windows of 25, 50,
    100, ... and 50 fast iterations at the end; the last slow window absorbs any
    remainder. A warm-up shorter than 150 iterations adapts the step size only: each
    metric update restarts dual averaging, and its averaged step needs the full final
    buffer to settle (after a handful of iterations it can be ten times too large).
    """
    if warmup < _INIT_BUFFER + _BASE_WINDOW + _TERM_BUFFER:
        return []
    windows = []
    start, size = _INIT_BUFFER, _BASE_WINDOW
    last = warmup - _TERM_BUFFER
    while start < last:
        end = start + size
        if end + 2 * size > last:
            end = last
        windows.append((start, end))
        start, size = end, 2 * size
    return windows


class RunningVariance(NamedTuple):
    """Welford accumulators over draws, per chain: count (scalar), mean and m2 (C, P)."""

    count: int
    mean: Tensor
    m2: Tensor


def running_variance_start(like: Tensor) -> RunningVariance:
    return RunningVariance(0, torch.zeros_like(like), torch.zeros_like(like))


def running_variance_update(state: RunningVariance, x: Tensor) -> RunningVariance:
    count = state.count + 1
    delta = x - state.mean
    mean = state.mean + delta / count
    return RunningVariance(count, mean, state.m2 + delta * (x - mean))


def regularised_variance(state: RunningVariance) -> Tensor:
    """Window variance shrunk towards 1e-3 (weight 5 / (n + 5)), so short windows stay safe."""
    n = state.count
    variance = state.m2 / max(n - 1, 1)
    return (n / (n + 5.0)) * variance + 1e-3 * (5.0 / (n + 5.0))


def jitter_factors(chains: int, jitter: float, generator: torch.Generator) -> Tensor:
    """Multipliers drawn uniformly from [1 - jitter, 1 + jitter], one per chain."""
    if jitter == 0.0:
        return torch.ones(chains, dtype=torch.float64)
    u = torch.rand(chains, generator=generator, dtype=torch.float64)
    return 1.0 + jitter * (2.0 * u - 1.0)


def steps_for(trajectory_length: float, step_size: Tensor, max_steps: int) -> Tensor:
    """Leapfrog steps per chain: ceil(trajectory_length / step_size), within [1, max_steps]."""
    ratio = torch.as_tensor(trajectory_length, dtype=torch.float64) / step_size.to(torch.float64)
    ratio = torch.nan_to_num(ratio, nan=1.0, posinf=float(max_steps))
    return ratio.ceil().clamp(1, max_steps).to(torch.long)


LOG_HALF = math.log(0.5)
