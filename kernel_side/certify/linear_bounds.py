"""Bounds on every pairwise logit difference over a perturbation set, by IBP or by CROWN.

The question a certificate asks is folded into the network as one more linear layer: row
``(c, j)`` computes ``z_c - z_j``, merged into the last Linear layer where there is one
(Gowal et al. 2018 sec. 3 fold the specification the same way; it is tighter than bounding
each logit first).

CROWN (Zhang et al. 2018, NeurIPS, "Efficient neural network robustness certification with
general activation functions", Theorem 3.2) bounds an output by running row vectors backwards
through the network: affine layers by their transpose, non-linear ones by the linear
relaxations of :mod:`jostle.certify.relaxations`, and the input set at the end by its dual
norm. The pre-activation bounds every relaxation needs come from the same back-substitution,
layer by layer, and are intersected with the interval bounds at every layer, so CROWN is
never looser than IBP on the same network.
"""
from __future__ import annotations

import torch
from torch import Tensor, nn

from jostle.certify.intervals import PerturbationSet, ball_tightens, interval_step, leading_centre
from jostle.certify.network import ELEMENTWISE, Chain, Step
from jostle.certify.relaxations import activation_lines, through_activation, through_max_pool

__all__ = ["METHODS", "pair_lower_bounds", "output_bounds", "with_pairs"]

METHODS = ("ibp", "crown")


def pair_lower_bounds(chain: Chain, region: PerturbationSet, method: str) -> Tensor:
    """Lower bounds ``L[s, n, c, j]`` of ``z_c - z_j`` over the set, for every member and point (0 on the diagonal)."""
    steps = with_pairs(chain.steps)
    lower, _ = output_bounds(steps, region, method, upper_too=False)
    classes = chain.steps[-1].out_shape[0]
    out = torch.zeros(*lower.shape[:2], classes * classes, dtype=lower.dtype, device=lower.device)
    out[..., _off_diagonal(classes, lower.device)] = lower
    return out.reshape(*lower.shape[:2], classes, classes)


def output_bounds(steps: list[Step], region: PerturbationSet, method: str, upper_too: bool = True
                  ) -> tuple[Tensor, Tensor | None]:
    """Bounds [S, N, *out_shape] of the last step's output over ``region`` (upper None unless ``upper_too``)."""
    lower, upper = region.lower, region.upper
    inputs: list[tuple[Tensor, Tensor]] = []
    lines: dict[int, tuple[Tensor, ...]] = {}
    for i, step in enumerate(steps):
        inputs.append((lower, upper))
        ball = None
        if ball_tightens(steps, i, region.norm):
            ball = (leading_centre(steps, i, region.centre), region.eps)
        lower, upper = interval_step(step, lower, upper, ball)
        last = i == len(steps) - 1
        if method == "crown" and step.kind in ("linear", "conv", "avgpool") and (last or _feeds_relaxation(steps, i)):
            crown_lower, crown_upper = _back_substitute(steps, i, inputs, lines, region, both=not last or upper_too)
            lower = torch.maximum(lower, crown_lower)
            if crown_upper is not None:
                upper = torch.minimum(upper, crown_upper)
            upper = torch.maximum(upper, lower)  # two sound bounds cross only by rounding
    return lower, (upper if upper_too else None)


def with_pairs(steps: list[Step]) -> list[Step]:
    """``steps`` with the pairwise-difference rows ``e_c - e_j`` (c != j) merged into (or after) the last layer."""
    last = steps[-1]
    classes = last.out_shape[0]
    spec = _pair_matrix(classes, last.weight if last.weight is not None else None)
    if last.kind == "linear":
        weight = torch.einsum("kc,scd->skd", spec.to(last.weight.dtype), last.weight)
        bias = None if last.bias is None else torch.einsum("kc,sc->sk", spec.to(last.bias.dtype), last.bias)
        merged = Step("linear", last.name, last.module, weight, bias, last.in_shape, (spec.shape[0],))
        return [*steps[:-1], merged]
    dtype, device = _dtype_device(steps)
    weight = spec.to(dtype=dtype, device=device)[None]
    extra = Step("linear", "pairwise differences", nn.Identity(), weight, None, (classes,), (spec.shape[0],))
    return [*steps, extra]


def _back_substitute(steps: list[Step], index: int, inputs: list[tuple[Tensor, Tensor]],
                     lines: dict[int, tuple[Tensor, ...]], region: PerturbationSet, both: bool
                     ) -> tuple[Tensor, Tensor | None]:
    """CROWN bounds on the output of step ``index``: lower (and upper when ``both``), [S, N, *out_shape]."""
    shape = steps[index].out_shape
    size = int(torch.tensor(shape).prod())
    lower_ref = inputs[index][0]
    eye = torch.eye(size, dtype=lower_ref.dtype, device=lower_ref.device)
    rows = torch.cat([eye, -eye]) if both else eye
    weights = [int(s.weight.shape[0]) for s in steps[: index + 1] if s.weight is not None]
    members = max([int(lower_ref.shape[0]), *weights])
    lam = rows.reshape(1, 1, rows.shape[0], *shape).expand(members, region.centre.shape[1], -1, *shape)
    offset = torch.zeros(lam.shape[:3], dtype=lam.dtype, device=lam.device)
    for j in range(index, -1, -1):
        step = steps[j]
        if step.affine:
            added = step.bias_dot(lam)
            if added is not None:
                offset = offset + added
            lam = step.transpose(lam)
            continue
        if step.kind in ELEMENTWISE:
            if j not in lines:
                lines[j] = activation_lines(step.kind, *inputs[j])
            lam, added = through_activation(lam, lines[j])
        else:
            lam, added = through_max_pool(step, lam, *inputs[j])
        offset = offset + added
    bound = (offset + region.lowest(lam)).reshape(*lam.shape[:2], rows.shape[0])
    lower = bound[..., :size].reshape(*bound.shape[:2], *shape)
    upper = -bound[..., size:].reshape(*bound.shape[:2], *shape) if both else None
    return lower, upper


def _feeds_relaxation(steps: list[Step], index: int) -> bool:
    """Whether the next step after ``index`` that is not a Flatten is a non-linear one."""
    for step in steps[index + 1:]:
        if step.kind != "flatten":
            return not step.affine
    return False


def _pair_matrix(classes: int, like: Tensor | None) -> Tensor:
    rows = []
    for c in range(classes):
        for j in range(classes):
            if c != j:
                row = torch.zeros(classes, dtype=torch.float64)
                row[c], row[j] = 1.0, -1.0
                rows.append(row)
    spec = torch.stack(rows)
    return spec if like is None else spec.to(like.device)


def _off_diagonal(classes: int, device: torch.device) -> Tensor:
    flat = torch.arange(classes * classes, device=device)
    return flat[flat // classes != flat % classes]


def _dtype_device(steps: list[Step]) -> tuple[torch.dtype, torch.device]:
    for step in steps:
        if step.weight is not None:
            return step.weight.dtype, step.weight.device
    return torch.float32, torch.device("cpu")
