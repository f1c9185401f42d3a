"""Axis arithmetic for charts: 1-2-5 tick steps, log ticks and the domains of the explorer's
and the sweep's axes. Pure numpy, so the views (bqplot in ``jostle.widgets``) only place
what these return.
"""
from __future__ import annotations

import math
from typing import Any, NamedTuple

import numpy as np

__all__ = ["nice_step", "log_ticks", "LossAxis", "loss_axis_for", "ShareAxis", "share_axis", "count_axis",
           "step_ticks", "thinned", "tick_label_limit"]


def log_ticks(low: float, high: float, most: int = 4) -> np.ndarray:
    """Ticks for a log axis over [low, high] (common practice for log axes): the 1-2-5
    numbers inside it when at most ``most`` of them are, else the powers of ten inside it
    (thinned evenly to ``most``, ends kept); the two ends rounded to two significant digits
    when fewer than two nice numbers fall inside."""
    low, high = max(min(low, high), 1e-300), max(low, high, 1e-300)
    first, last = math.floor(math.log10(low)), math.ceil(math.log10(high))

    def inside(values):
        return [v for v in values if low * (1 - 1e-9) <= v <= high * (1 + 1e-9)]

    nice = inside([m * 10.0 ** k for k in range(first, last + 1) for m in (1.0, 2.0, 5.0)])
    if len(nice) < 2:
        return np.array(sorted({float(f"{low:.2g}"), float(f"{high:.2g}")}))
    if len(nice) <= most:
        return np.array(nice)
    decades = inside([10.0 ** k for k in range(first, last + 1)])
    ticks = decades if len(decades) >= 2 else nice
    keep = np.unique(np.round(np.linspace(0, len(ticks) - 1, min(most, len(ticks)))).astype(int))
    return np.array([ticks[i] for i in keep])


class LossAxis(NamedTuple):
    """Domain and ticks of the path chart's loss axis (all finite; ``ticks`` within the domain)."""

    low: float
    high: float
    ticks: np.ndarray
    tick_format: str


def loss_axis_for(loss: Any) -> LossAxis:
    """A loss axis that always shows the line: from 0 (or the least loss) to a little above the most.

    A flat loss (0 at a confidently classified point, or a converged attack) gets a span of
    its own size (1 when it is 0), and the bottom is padded by 5% so a line along 0 stays
    above the x axis. Non-finite values are left out; if none are finite the axis is 0..1.
    """
    values = np.asarray(loss, dtype=np.float64).ravel()
    values = values[np.isfinite(values)]
    low = min(0.0, float(values.min())) if values.size else 0.0
    high = float(values.max()) if values.size else 1.0
    span = high - low
    if span <= 1e-12 * max(1.0, abs(high)):
        span = abs(high) if abs(high) > 1e-12 else 1.0
        high = low + span
    step = nice_step(span / 3.0)
    ticks = np.arange(math.floor(low / step), math.floor(high / step) + 1) * step
    ticks = ticks[(ticks >= low - 1e-9 * span) & (ticks <= high + 1e-9 * span)]
    fmt = ".0f" if step >= 1 else (f".{min(6, -math.floor(math.log10(step)))}f" if step >= 1e-3 else ".0e")
    return LossAxis(low - 0.05 * span, high + 0.08 * span, ticks, fmt)


class ShareAxis(NamedTuple):
    """Domain, 1-2-5 ticks inside it and their labels, for an axis of shares in [0, 1]."""

    low: float
    high: float
    ticks: np.ndarray
    labels: list[str]


def share_axis(values: Any) -> ShareAxis:
    """An axis for shares (accuracy, robustness): the finite values padded by 8% of their
    span (at least 0.01), never past 0 or 1 (0..1 if none is finite), with 2 to 7 ticks at
    multiples of 1, 2 or 5 times a power of ten, labelled to the step's decimals."""
    values = np.asarray(values, dtype=np.float64).ravel()
    values = values[np.isfinite(values)]
    low, high = (float(values.min()), float(values.max())) if values.size else (0.0, 1.0)
    pad = max(0.08 * (high - low), 0.01)
    low, high = max(low - pad, 0.0), min(high + pad, 1.0)
    if high <= low:  # every value at 0 or at 1 exactly
        low, high = (0.0, 0.01) if high <= 0.0 else (0.99, 1.0)
    # a step of at least span / 6 gives at most 7 ticks; 1-2-5 steps grow at most 2.5-fold,
    # so the step is below span / 2.4 and at least 2 multiples fall inside
    step = nice_step((high - low) / 6.0)
    first, last = math.ceil(low / step - 1e-9), math.floor(high / step + 1e-9)
    decimals = max(0, -math.floor(math.log10(step) + 1e-9))
    ticks = np.array([round(k * step, decimals + 3) for k in range(first, last + 1)])
    return ShareAxis(low, high, ticks, [f"{t:.{decimals}f}" for t in ticks])


def count_axis(most: float) -> tuple[float, np.ndarray]:
    """Top of a member-count axis and its integer ticks, all >= 0 (at least 0..1)."""
    top = max(1.0, float(math.ceil(most)))
    step = max(1.0, nice_step(top / 4.0))
    step = float(math.ceil(step))
    return top, np.arange(0.0, top + 0.5, step)


def step_ticks(last: float, most: int = 5) -> np.ndarray:
    """Whole-number ticks from 0 to ``last`` (an attack's step axis): at most ``most``, evenly spread."""
    last = max(0.0, float(last))
    return np.unique(np.round(np.linspace(0.0, last, min(most, int(last) + 1))))


def thinned(values: Any, most: int) -> np.ndarray:
    """At most ``most`` of ``values``, evenly spread, the first and last kept."""
    values = np.asarray(values)
    if values.size == 0:
        return values
    keep = np.unique(np.round(np.linspace(0, values.size - 1, min(most, values.size))).astype(int))
    return values[keep]


def tick_label_limit(n_classes: int) -> int:
    """Characters a class-name tick label may take so neighbours do not run together."""
    return max(4, min(12, 48 // max(1, n_classes)))


def nice_step(raw: float) -> float:
    """1, 2 or 5 times a power of ten, the least not below ``raw`` (common practice for axis ticks)."""
    power = 10.0 ** math.floor(math.log10(raw))
    return next(m * power for m in (1.0, 2.0, 5.0, 10.0) if m * power >= raw * (1 - 1e-9))
