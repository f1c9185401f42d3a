"""Network builders whose architecture is recorded, so saved posteriors can be rebuilt."""
from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import torch
from torch import nn

from jostle.common.checks import check_choice, check_float, check_int

__all__ = ["mlp", "register_architecture", "build_architecture", "architecture_of", "init_parameters"]

ACTIVATIONS: dict[str, Callable[[], nn.Module]] = {
    "tanh": nn.Tanh,
    "relu": nn.ReLU,
    "gelu": nn.GELU,
    "silu": nn.SiLU,
    "elu": nn.ELU,
    "sigmoid": nn.Sigmoid,
    "softplus": nn.Softplus,
}

_BUILDERS: dict[str, Callable[..., nn.Module]] = {}
_ARCH_ATTR = "_jostle_architecture"


def register_architecture(name: str, builder: Callable[..., nn.Module]) -> None:
    """Register ``builder(**kwargs) -> nn.Module`` under ``name`` so that files can rebuild it.

    The builder's keyword arguments must be JSON-serialisable. Modules it returns are tagged
    with ``{"builder": name, "kwargs": kwargs}`` by :func:`build_architecture`.
    """
    if not isinstance(name, str) or not name:
        raise ValueError(f"name must be a non-empty string; got {name!r}")
    _BUILDERS[name] = builder


def build_architecture(name: str, **kwargs: Any) -> nn.Module:
    """Build a registered architecture and tag it so it can be saved and rebuilt."""
    if name not in _BUILDERS:
        known = ", ".join(sorted(_BUILDERS)) or "none"
        raise ValueError(f"architecture must be a registered builder ({known}); got {name!r}")
    module = _BUILDERS[name](**kwargs)
    setattr(module, _ARCH_ATTR, {"builder": name, "kwargs": kwargs})
    return module


def architecture_of(module: nn.Module) -> dict | None:
    """The ``{"builder", "kwargs"}`` record of a module built by a registered builder, else None."""
    record = getattr(module, _ARCH_ATTR, None)
    return None if record is None else {"builder": record["builder"], "kwargs": dict(record["kwargs"])}


def mlp(
    in_features: int,
    classes: int,
    hidden: tuple[int, ...] | list[int] = (32, 32),
    activation: str = "tanh",
    dropout: float = 0.0,
) -> nn.Sequential:
    """A fully connected classifier ``in -> hidden... -> classes`` returning logits.

    Parameters
    ----------
    in_features : int
        Number of input features (64 for the flattened 8x8 digits).
    classes : int
        Number of output classes (>= 2).
    hidden : sequence of int
        Widths of the hidden layers; empty gives a linear (softmax regression) model.
    activation : str
        One of ``tanh``, ``relu``, ``gelu``, ``silu``, ``elu``, ``sigmoid``, ``softplus``.
    dropout : float
        Dropout probability after each hidden activation (0 adds no dropout layers).

    Examples
    --------
    >>> net = mlp(2, 2, hidden=(8,))
    >>> [type(layer).__name__ for layer in net]
    ['Linear', 'Tanh', 'Linear']
    """
    in_features = check_int("in_features", in_features, low=1)
    classes = check_int("classes", classes, low=2)
    if isinstance(hidden, int) or not all(isinstance(h, int) and not isinstance(h, bool) for h in hidden):
        raise ValueError(f"hidden must be a sequence of positive integers; got {hidden!r}")
    hidden = [check_int("hidden width", h, low=1) for h in hidden]
    check_choice("activation", activation, tuple(ACTIVATIONS))
    dropout = check_float("dropout", dropout, low=0.0, high=1.0, high_open=True)
    return build_architecture(
        "mlp", in_features=in_features, classes=classes, hidden=hidden,
        activation=activation, dropout=dropout,
    )


def _build_mlp(in_features, classes, hidden, activation, dropout) -> nn.Sequential:
    layers: list[nn.Module] = []
    width = in_features
    for size in hidden:
        layers += [nn.Linear(width, size), ACTIVATIONS[activation]()]
        if dropout > 0:
            layers.append(nn.Dropout(dropout))
        width = size
    layers.append(nn.Linear(width, classes))
    return nn.Sequential(*layers)


register_architecture("mlp", _build_mlp)


@torch.no_grad()
def init_parameters(module: nn.Module, generator: torch.Generator) -> nn.Module:
    """Re-draw every Linear layer's weights with PyTorch's default scheme, from ``generator``.

    PyTorch's own initialisers draw from the global RNG; this keeps seeding explicit.
    Weights and biases are U(-1/sqrt(fan_in), 1/sqrt(fan_in)), which is what
    ``nn.Linear.reset_parameters`` gives (kaiming_uniform with a = sqrt(5)).
    """
    for layer in module.modules():
        if isinstance(layer, nn.Linear):
            bound = 1.0 / math.sqrt(layer.in_features)
            device = layer.weight.device
            weight = torch.rand(layer.weight.shape, generator=generator, dtype=layer.weight.dtype)
            layer.weight.copy_((weight * 2 - 1).mul_(bound).to(device))
            if layer.bias is not None:
                bias = torch.rand(layer.bias.shape, generator=generator, dtype=layer.bias.dtype)
                layer.bias.copy_((bias * 2 - 1).mul_(bound).to(device))
    return module
