"""The perturbation set and interval bound propagation (IBP) through a chain of layers.

The set is an L-inf or L2 ball of radius ``eps`` around each point, intersected with the
data bounds. IBP carries a box ``[lower, upper]`` layer by layer (Gowal et al. 2018, "On the
effectiveness of interval bound propagation for training verifiably robust models", eqs. 6):
an affine layer maps the box's centre ``c`` and radius ``r`` to ``W c + b`` and ``|W| r``,
which is the exact box around the image; monotone layers (ReLU, tanh, sigmoid, max pooling)
map the two corners.

For an L2 ball the box is the ball's bounding box ``x +- eps`` cut by the data bounds; the
first affine layer also uses the ball itself, since ``w . x'`` over the ball lies within
``w . x +- eps ||w||_2`` (Hoelder's inequality, the dual norm), and keeps the tighter end.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor

from jostle.certify.network import Step

__all__ = ["PerturbationSet", "interval_step", "leading_centre", "ball_tightens"]


@dataclass
class PerturbationSet:
    """The inputs a certificate covers: ``{x' : ||x' - x|| <= eps} ∩ [lo, hi]``, per member and point.

    Attributes
    ----------
    centre : Tensor of shape (1, n_points, *input_shape)
    eps : Tensor of shape (S or 1, n_points)
    norm : {"inf", "2"}
    lower, upper : Tensor of shape (S or 1, n_points, *input_shape)
        The box that holds the set: ``x +- eps`` cut by the data bounds.
    """

    centre: Tensor
    eps: Tensor
    norm: str
    lower: Tensor
    upper: Tensor

    @classmethod
    def around(cls, x: Tensor, eps: Tensor, norm: str, box: tuple[Tensor, Tensor] | None) -> PerturbationSet:
        """The set around ``x`` [N, *shape] with ``eps`` [S or 1, N] and optional data bounds (each [*shape])."""
        centre = x[None]
        reach = eps.reshape(*eps.shape, *([1] * (x.dim() - 1)))
        lower, upper = centre - reach, centre + reach
        if box is not None:
            lower, upper = torch.maximum(lower, box[0]), torch.minimum(upper, box[1])
            upper = torch.maximum(upper, lower)  # a point on the boundary stays inside after rounding
        return cls(centre, eps, norm, lower, upper)

    def lowest(self, lam: Tensor) -> Tensor:
        """Lower bound of ``lam . x'`` [S, N, K] over the set, for row vectors ``lam`` [S, N, K, *input_shape]."""
        rows = lam.flatten(3)
        mid = (0.5 * (self.lower + self.upper)).flatten(2).unsqueeze(2)
        radius = (0.5 * (self.upper - self.lower)).flatten(2).unsqueeze(2)
        over_box = (rows * mid).sum(-1) - (rows.abs() * radius).sum(-1)
        if self.norm == "inf":
            return over_box
        over_ball = (rows * self.centre.flatten(2).unsqueeze(2)).sum(-1) - self.eps.unsqueeze(-1) * rows.norm(dim=-1)
        return torch.maximum(over_box, over_ball)


def interval_step(step: Step, lower: Tensor, upper: Tensor, ball: tuple[Tensor, Tensor] | None = None
                  ) -> tuple[Tensor, Tensor]:
    """The box image of ``[lower, upper]`` [S or 1, B, *in_shape] under ``step``.

    ``ball`` = (centre, eps) pushed to this step's input, for the L2 dual-norm bound of the
    first affine layer (:func:`ball_tightens`).
    """
    if not step.affine:
        return step.apply(lower), step.apply(upper)
    mid, radius = 0.5 * (lower + upper), 0.5 * (upper - lower)
    centre_out, spread = step.apply(mid), step.apply_abs(radius)
    low, high = centre_out - spread, centre_out + spread
    if ball is not None:
        image = step.apply(ball[0])
        reach = ball[1].reshape(*ball[1].shape, *([1] * len(step.out_shape))) * step.row_norms()
        low, high = torch.maximum(low, image - reach), torch.minimum(high, image + reach)
    return low, high


def ball_tightens(steps: list[Step], index: int, norm: str) -> bool:
    """Whether step ``index`` is the first Linear or Conv2d with nothing but Flatten before it, under L2."""
    return (norm == "2" and steps[index].kind in ("linear", "conv")
            and all(step.kind == "flatten" for step in steps[:index]))


def leading_centre(steps: list[Step], index: int, centre: Tensor) -> Tensor:
    """The ball's centre pushed through the Flatten steps before step ``index``."""
    for step in steps[:index]:
        centre = step.apply(centre)
    return centre
