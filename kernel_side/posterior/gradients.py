"""The gradient engine: the attack objectives and their input gradients over an ensemble.

One plan per ensemble, chosen when it is built (:class:`GradientEngine`): Linear + tanh /
ReLU / sigmoid stacks take the planned hand-written passes of
:class:`jostle.posterior.planned_gradient.ExpectedLossGradient` (measured 1.4-1.9x faster
than autograd for 100 points and 1.8x for one point, 100 members of 2-64-64-2,
benchmarks/bench_attacks.py); every other module takes ``torch.autograd`` through the
batched forward (a hand-written pass for convolutional stacks measured 1.0-1.15x on one
thread, below the bar; DEVELOPERS.md). ``backward="autograd"`` forces autograd, the reference the tests hold
the planned passes to.

Objectives, from member logits [S, n, C] and labels [n]:

``expected_loss``
    ``mean_s -log p_s(y | x)`` (its gradient is the mean of the members' gradients).
``predictive``
    ``-log mean_s p_s(y | x)``, with ``logsumexp`` over members.
``margin``
    ``max_{c != y} log p(c | x) - log p(y | x)`` on the averaged predictive.
"""
from __future__ import annotations

import math
import threading
import weakref
from collections.abc import Callable
from numbers import Integral
from typing import Any

import torch
from torch import Tensor
from torch.func import functional_call, grad, vmap

import jostle.posterior.forward as forward_plans
from jostle.common.checks import check_choice
from jostle.posterior.forward import ConvPlan, ForwardPlan, MLPPlan, chunk_sizes
from jostle.posterior.planned_gradient import ExpectedLossGradient

__all__ = ["OBJECTIVES", "BACKWARDS", "objective_values", "GradientEngine"]

OBJECTIVES = ("expected_loss", "predictive", "margin")
BACKWARDS = ("auto", "autograd")

# Planned kernels kept per ensemble (a fixed attacker's kernel is reused step after step).
_KEPT_KERNELS = 4


def objective_values(logits: Tensor, labels: Tensor, name: str) -> Tensor:
    """Per-point objective [n] from member logits [S, n, C] and labels [n] (module docstring)."""
    # Classes first: with few classes a softmax along the last dim costs ~10x one along
    # the outer dim (measured on CPU at C = 2, S = N = 100), and the attack runs it each step.
    log_probs = torch.log_softmax(logits.permute(2, 0, 1), dim=0)
    members = log_probs.shape[1]
    if name == "expected_loss":
        index = labels.view(1, 1, -1).expand(1, members, -1)
        return -log_probs.gather(0, index).squeeze(0).mean(0)
    predictive = torch.logsumexp(log_probs, dim=1) - math.log(members)
    chosen = predictive.gather(0, labels.view(1, -1)).squeeze(0)
    if name == "predictive":
        return -chosen
    others = predictive.scatter(0, labels.view(1, -1), float("-inf"))
    return others.amax(0) - chosen


class GradientEngine:
    """The input-gradient plan of one ensemble, chosen once from its forward plan.

    ``planned`` is True when :class:`ExpectedLossGradient` covers the network; the engine
    then keeps the last few planned kernels (per member selection and labels tensor), so
    that an attack's steps reuse one.
    """

    def __init__(self, plan: ForwardPlan):
        self.plan = plan
        self.planned = isinstance(plan, MLPPlan) and ExpectedLossGradient.layout(plan.steps) is not None
        self._kernels: list[tuple] = []
        self._lock = threading.Lock()

    def value_and_input_grad(self, ens, x: Tensor, labels: Tensor, objective: str, members: Any,
                             sign: float, backward: str) -> tuple[Tensor, Tensor]:
        """``sign * objective`` [n] and its gradient in ``x`` (checked inputs; see
        :meth:`jostle.Ensemble.value_and_input_grad`)."""
        if backward == "auto" and self.planned:
            kernel = self._kernel(ens, members, labels, sign)
            if objective == "expected_loss":
                return kernel(x)
            if kernel.takes_any_head:
                return kernel.head_value_and_grad(x, _head(labels, objective, sign))
        with torch.enable_grad():
            leaf = x.detach().requires_grad_(True)
            value = ens.map_logits(leaf, _head(labels, objective, sign), samples=members)
            (gradient,) = torch.autograd.grad(value.sum(), leaf)
        return value.detach(), gradient

    def member_input_grads(self, ens, x: Tensor, labels: Tensor, members: Any, backward: str) -> Tensor:
        """Each selected member's input gradient of its own cross-entropy -> [S, n, ...]."""
        if backward == "auto" and self.planned:
            return self._kernel(ens, members, labels, 1.0).member_gradients(x)
        if backward == "auto" and isinstance(self.plan, ConvPlan):
            return self._blocked_member_grads(ens, x, labels, members)
        template = ens.template

        def member_loss(params: dict[str, Tensor], points: Tensor, targets: Tensor) -> Tensor:
            logits = functional_call(template, params, (points,))
            return torch.nn.functional.cross_entropy(logits, targets, reduction="sum")

        per_member = vmap(grad(member_loss, argnums=1), in_dims=(0, None, None))
        params = {k: v.detach() for k, v in ens._selected(members).items()}
        count, points = int(next(iter(params.values())).shape[0]), int(x.shape[0])
        # every member in each point chunk; a forward and a backward kept per pair
        pair_bytes = 3 * self.plan.floats_per_pair * x.element_size() * count
        _, chunk = chunk_sizes(1, points, pair_bytes, 0, ens.memory_budget)
        # Points are independent, so the sum over a chunk yields each point's own gradient.
        pieces = [per_member(params, x[i:i + chunk], labels[i:i + chunk]) for i in range(0, points, chunk)]
        return torch.cat(pieces, dim=1)

    def _blocked_member_grads(self, ens, x: Tensor, labels: Tensor, members: Any) -> Tensor:
        """Member input gradients through the convolutional pass: each member gets its own
        copy of the inputs (``per_member=True``), in the blocks of the plan's size rule, and
        one backward of the summed losses gives every member's gradient (members and points
        are independent)."""
        params = {k: v.detach() for k, v in ens._selected(members).items()}
        count, points = int(next(iter(params.values())).shape[0]), int(x.shape[0])
        out = x.new_empty((count, *x.shape))
        with torch.enable_grad():
            member_chunk, point_chunk = self.plan.chunk_sizes(count, points, ens.memory_budget, x.element_size(),
                                                                 x.device)
            for m0 in range(0, count, member_chunk):
                block = {k: v[m0:m0 + member_chunk] for k, v in params.items()}
                size = int(next(iter(block.values())).shape[0])
                for n0 in range(0, points, point_chunk):
                    piece = x[n0:n0 + point_chunk]
                    leaf = piece.unsqueeze(0).expand(size, *piece.shape).clone().requires_grad_(True)
                    logits = self.plan.forward(block, leaf, per_member=True)
                    targets = labels[n0:n0 + point_chunk].repeat(size)
                    loss = torch.nn.functional.cross_entropy(logits.reshape(-1, logits.shape[-1]), targets,
                                                             reduction="sum")
                    (out[m0:m0 + size, n0:n0 + point_chunk],) = torch.autograd.grad(loss, leaf)
        return out

    def _kernel(self, ens, members: Any, labels: Tensor, sign: float) -> ExpectedLossGradient:
        """The planned kernel for these members and labels: kept, or built and kept.

        A kept kernel is reused while its labels tensor lives unchanged and the ensemble's
        parameters are the same tensors, unmodified (their version counters); it is
        dropped with its labels, so a finished attack leaves nothing behind.
        """
        key = (_selection_key(members), sign, ens.memory_budget)
        stamp = tuple((v.data_ptr(), v._version) for v in ens.params.values()) + (labels._version,)
        with self._lock:
            self._kernels = [entry for entry in self._kernels if entry[1]() is not None]
            for entry in self._kernels:
                if entry[0] == key and entry[1]() is labels and entry[2] == stamp:
                    return entry[3]
        params = {k: v.detach() for k, v in ens._selected(members).items()}
        budget = min(ens.memory_budget, forward_plans.CACHE_BYTES)
        kernel = ExpectedLossGradient.try_build(self.plan.steps, params, labels, sign, chunk_bytes=budget)
        with self._lock:
            self._kernels = (self._kernels + [(key, weakref.ref(labels), stamp, kernel)])[-_KEPT_KERNELS:]
        return kernel


def check_backward(backward: Any) -> str:
    """``backward`` as one of :data:`BACKWARDS`, or a clear error."""
    return check_choice("backward", backward, BACKWARDS)


def _head(labels: Tensor, objective: str, sign: float) -> Callable[[Tensor, slice], Tensor]:
    def head(logits: Tensor, where: slice) -> Tensor:
        return sign * objective_values(logits, labels[where], objective)
    return head


def _selection_key(members: Any) -> Any:
    if members is None or (isinstance(members, Integral) and not isinstance(members, bool)):
        return members
    if isinstance(members, Tensor):
        return ("index", tuple(members.flatten().tolist()), str(members.dtype))
    return ("index", tuple(members))
