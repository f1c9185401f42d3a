"""The elementwise activations the batched passes know: forward, in-place forward, derivative.

One table, read by the forward passes (:mod:`jostle.posterior.forward`) and by the planned
input gradient (:mod:`jostle.posterior.planned_gradient`). Each entry holds

* ``in_place(layer, h)``: the activation applied to ``h`` in place (used when no autograd
  graph is recorded: on a 2-core CPU a fresh allocation per layer costs more than the tanh
  itself), or None where torch has no in-place form;
* ``from_output(delta, h, out)``: for activations whose derivative is a function of their
  output alone (tanh' = 1 - h^2, relu' = [h > 0], sigmoid' = h (1 - h)), ``delta`` times
  the derivative written into ``out``, with the fused kernels autograd itself calls. These
  three are the ones the planned input gradient covers; any other activation takes its
  derivative from autograd (a hand-written backward for them measured no faster than
  autograd at the widgets' sizes, benchmarks/bench_attacks.py).

``nn.Identity`` and ``nn.Dropout`` in eval mode are the identity and are skipped.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import torch
from torch import Tensor, nn
from torch.nn import functional

__all__ = ["Activation", "ACTIVATIONS", "ELEMENTWISE", "activation_of", "is_identity"]


@dataclass(frozen=True)
class Activation:
    """What the batched passes need of one elementwise activation (see the module docstring)."""

    name: str
    in_place: Callable[[nn.Module, Tensor], Tensor] | None = None
    from_output: Callable[[Tensor, Tensor, Tensor], Tensor] | None = None


ACTIVATIONS: dict[type, Activation] = {
    nn.Tanh: Activation(
        "tanh", lambda layer, h: h.tanh_(),
        lambda d, h, out: torch.ops.aten.tanh_backward.grad_input(d, h, grad_input=out)),
    nn.ReLU: Activation(
        "relu", lambda layer, h: h.relu_(),
        lambda d, h, out: torch.ops.aten.threshold_backward.grad_input(d, h, 0, grad_input=out)),
    nn.Sigmoid: Activation(
        "sigmoid", lambda layer, h: h.sigmoid_(),
        lambda d, h, out: torch.ops.aten.sigmoid_backward.grad_input(d, h, grad_input=out)),
    nn.SiLU: Activation("silu", lambda layer, h: functional.silu(h, inplace=True)),
    nn.ELU: Activation("elu", lambda layer, h: functional.elu(h, layer.alpha, inplace=True)),
    nn.LeakyReLU: Activation(
        "leaky_relu", lambda layer, h: functional.leaky_relu(h, layer.negative_slope, inplace=True)),
    nn.Softplus: Activation("softplus"),
    nn.GELU: Activation("gelu"),
    nn.Mish: Activation("mish"),
    nn.Hardtanh: Activation("hardtanh"),
}

#: Layers the batched MLP pass evaluates elementwise (the table plus the identities).
ELEMENTWISE = tuple(ACTIVATIONS) + (nn.Identity, nn.Dropout)


def is_identity(layer: nn.Module) -> bool:
    """Whether ``layer`` passes its input through unchanged (Identity, Dropout in eval mode)."""
    return type(layer) is nn.Identity or (type(layer) is nn.Dropout and (not layer.training or layer.p == 0))


def activation_of(layer: nn.Module) -> Activation | None:
    """The table's entry for ``layer`` (exact type, not subclasses), or None."""
    return ACTIVATIONS.get(type(layer))
