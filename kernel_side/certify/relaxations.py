"""Linear lower and upper bounds of the non-linear layers over an interval of their input.

For an activation ``f`` and pre-activation bounds ``l <= z <= u`` each neuron gets two
lines, ``a_lo z + b_lo <= f(z) <= a_up z + b_up`` on ``[l, u]`` (Zhang et al. 2018,
"Efficient neural network robustness certification with general activation functions",
NeurIPS, sec. 3.2 and their table of bounds):

- ReLU: the chord from ``(l, 0)`` to ``(u, relu(u))`` above; below, slope 1 where ``u >= -l``
  and 0 elsewhere (the adaptive choice).
- tanh and sigmoid (convex left of 0, concave right of it): in the concave part a tangent
  above and the chord below, in the convex part the chord above and a tangent below; when
  ``l < 0 < u``, the tangent at ``d >= 0`` that passes through ``(l, f(l))`` above (found by
  bisection, keeping the side that is sound), or the chord where that tangent would touch
  beyond ``u``; the lower line is the mirror image (``f(-z) = 2 f(0) - f(z)``).

Max pooling over a window ``x_1..x_k`` with input bounds: below, ``x_j`` for the window's
element with the largest lower bound; above, the same ``x_j`` where its lower bound is at
least every other element's upper bound (the max is then exactly ``x_j``), else the
constant largest upper bound (from memory; the rule of the DeepPoly abstract domain,
Singh et al. 2019).
"""
from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import Tensor

from jostle.certify.network import Step

__all__ = ["activation_lines", "through_activation", "through_max_pool"]

# Below this width an interval is treated as a point: the chord's slope would be rounding noise,
# so the upper line is the constant f(u) (sound, since f is increasing).
_NARROW = 1e-6


def activation_lines(kind: str, lower: Tensor, upper: Tensor) -> tuple[Tensor, Tensor, Tensor, Tensor]:
    """``(a_lo, b_lo, a_up, b_up)`` with ``a_lo z + b_lo <= f(z) <= a_up z + b_up`` for ``z`` in ``[lower, upper]``."""
    if kind == "relu":
        return _relu_lines(lower, upper)
    f, slope = (torch.tanh, _tanh_slope) if kind == "tanh" else (torch.sigmoid, _sigmoid_slope)
    centre = float(f(torch.zeros(())))
    a_up, b_up = _s_shaped_upper(f, slope, lower, upper)
    a_mirror, b_mirror = _s_shaped_upper(f, slope, -upper, -lower)
    return a_mirror, 2.0 * centre - b_mirror, a_up, b_up


def through_activation(lam: Tensor, lines: tuple[Tensor, ...]) -> tuple[Tensor, Tensor]:
    """Back through an activation, for a lower bound of ``lam . f(z)``: returns the new ``lam`` and its offset.

    ``lam`` has shape [S, B, K, *shape]; each line [S, B, *shape]. Positive coefficients take
    the lower line, negative ones the upper line.
    """
    a_lo, b_lo, a_up, b_up = (line.unsqueeze(2) for line in lines)
    positive, negative = lam.clamp_min(0), lam.clamp_max(0)
    offset = (positive * b_lo + negative * b_up).flatten(3).sum(-1)
    return positive * a_lo + negative * a_up, offset


def through_max_pool(step: Step, lam: Tensor, lower: Tensor, upper: Tensor) -> tuple[Tensor, Tensor]:
    """Back through a MaxPool2d with input bounds ``lower``/``upper`` [S, B, C, H, W], as :func:`through_activation`."""
    members, points, rows = lam.shape[:3]
    channels, height, width = step.in_shape
    chosen, exact, largest = _pool_windows(step, lower, upper)  # each [S, B, C, L]
    lam = lam.reshape(members, points, rows, channels, -1)
    positive, negative = lam.clamp_min(0), lam.clamp_max(0)
    coefficient = positive + negative * exact.unsqueeze(2)
    offset = (negative * torch.where(exact, 0.0, largest).unsqueeze(2)).flatten(3).sum(-1)
    out = torch.zeros(members, points, rows, channels, height * width, dtype=lam.dtype, device=lam.device)
    full = (members, points, rows, channels, coefficient.shape[-1])
    out.scatter_add_(-1, chosen.unsqueeze(2).expand(full), coefficient.expand(full).contiguous())
    return out.reshape(members, points, rows, channels, height, width), offset


def _pool_windows(step: Step, lower: Tensor, upper: Tensor) -> tuple[Tensor, Tensor, Tensor]:
    """Per window: the input with the largest lower bound, whether the max is exactly it, the largest upper bound."""
    pool = step.module
    channels, height, width = step.in_shape
    members, points = lower.shape[:2]
    pad = _pair(pool.padding)
    options = {"kernel_size": pool.kernel_size, "dilation": pool.dilation, "stride": pool.stride}

    def windows(t: Tensor, fill: float) -> Tensor:
        padded = F.pad(t.reshape(-1, channels, height, width), (pad[1], pad[1], pad[0], pad[0]), value=fill)
        cols = F.unfold(padded, **options)  # [SB, C*k, L]
        return cols.reshape(cols.shape[0], channels, -1, cols.shape[-1])

    low, up = windows(lower, float("-inf")), windows(upper, float("-inf"))
    positions = torch.arange(height * width, dtype=torch.float64, device=lower.device).reshape(1, 1, height, width)
    positions = positions.expand(1, channels, height, width).to(lower.dtype)
    index = windows(positions, -1.0)[0, 0].long()  # [k, L], -1 on padding
    best = low.argmax(2, keepdim=True)  # [SB, C, 1, L]
    lower_best = low.gather(2, best)
    others = up.scatter(2, best, float("-inf")).amax(2, keepdim=True)
    exact = (lower_best >= others).squeeze(2)
    largest = up.amax(2)
    chosen = index.expand(best.shape[0], channels, -1, -1).gather(2, best).squeeze(2)
    shape = (members, points, channels, -1)
    return chosen.reshape(shape), exact.reshape(shape), largest.reshape(shape)


def _relu_lines(lower: Tensor, upper: Tensor) -> tuple[Tensor, Tensor, Tensor, Tensor]:
    active, dead = lower >= 0, upper <= 0
    unstable = ~(active | dead)
    width = (upper - lower).clamp_min(torch.finfo(lower.dtype).tiny)
    chord = torch.where(unstable, upper / width, active.to(lower.dtype))
    a_up, b_up = chord, torch.where(unstable, -lower * upper / width, 0.0)
    a_lo = torch.where(unstable, (upper >= -lower).to(lower.dtype), active.to(lower.dtype))
    return a_lo, torch.zeros_like(lower), a_up, b_up


def _s_shaped_upper(f, slope, lower: Tensor, upper: Tensor) -> tuple[Tensor, Tensor]:
    """An upper line of an increasing f that is convex on z < 0 and concave on z > 0, on [lower, upper]."""
    f_lo, f_up = f(lower), f(upper)
    narrow = (upper - lower) < _NARROW * (1.0 + upper.abs())
    width = torch.where(narrow, 1.0, upper - lower)
    chord_a = (f_up - f_lo) / width
    chord_b = f_lo - chord_a * lower
    # concave region (l >= 0): the tangent at the midpoint lies above f on [0, inf)
    mid = 0.5 * (lower + upper)
    tan_a, tan_b = slope(mid), f(mid) - slope(mid) * mid
    # mixed region: tangent at d in [0, u] through (l, f(l)); where even d = u falls short, the chord
    touch = _tangent_through(f, slope, lower, upper)
    touch_a, touch_b = slope(touch), f(touch) - slope(touch) * touch
    chord_valid = f_up + slope(upper) * (lower - upper) <= f_lo
    mixed_a = torch.where(chord_valid, chord_a, touch_a)
    mixed_b = torch.where(chord_valid, chord_b, touch_b)
    a = torch.where(upper <= 0, chord_a, torch.where(lower >= 0, tan_a, mixed_a))
    b = torch.where(upper <= 0, chord_b, torch.where(lower >= 0, tan_b, mixed_b))
    return torch.where(narrow, 0.0, a), torch.where(narrow, f_up, b)


def _tangent_through(f, slope, lower: Tensor, upper: Tensor) -> Tensor:
    """Smallest d in [0, u] (from above) with f(d) + f'(d)(l - d) >= f(l); u where there is none.

    Only the neurons whose interval straddles 0 use the tangent, so only they are bisected; the
    bisection keeps the sound end and runs as many halvings as the dtype has mantissa bits (a
    narrower bracket than that is rounding).
    """
    touch = upper.clamp_min(0)
    mixed = (lower < 0) & (upper > 0)
    if not bool(mixed.any()):
        return touch
    low_end, up_end = lower[mixed], upper[mixed]
    f_lo = f(low_end)
    low, high = torch.zeros_like(low_end), up_end
    for _ in range(round(-math.log2(torch.finfo(lower.dtype).eps)) + 1):
        mid = 0.5 * (low + high)
        above = f(mid) + slope(mid) * (low_end - mid) >= f_lo
        high = torch.where(above, mid, high)
        low = torch.where(above, low, mid)
    return touch.masked_scatter(mixed, high)


def _tanh_slope(z: Tensor) -> Tensor:
    return 1.0 - torch.tanh(z).square()


def _sigmoid_slope(z: Tensor) -> Tensor:
    s = torch.sigmoid(z)
    return s * (1.0 - s)


def _pair(value) -> tuple[int, int]:
    return (value, value) if isinstance(value, int) else tuple(value)
