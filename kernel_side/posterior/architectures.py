"""Network builders whose architecture is recorded, so saved posteriors can be rebuilt."""
from __future__ import annotations

import copy
import math
from collections.abc import Callable
from typing import Any

import torch
from torch import Tensor, nn

from jostle.common.checks import check_choice, check_float, check_int

__all__ = [
    "mlp", "cnn", "ImageView", "DropoutMask", "with_dropout_masks", "register_architecture", "build_architecture",
    "architecture_of", "architecture_maker", "init_parameters",
]

ACTIVATIONS: dict[str, Callable[[], nn.Module]] = {
    "tanh": nn.Tanh,
    "relu": nn.ReLU,
    "gelu": nn.GELU,
    "silu": nn.SiLU,
    "elu": nn.ELU,
    "sigmoid": nn.Sigmoid,
    "softplus": nn.Softplus,
}

# name -> (builder, its checked public function or None): the one registry of architectures
_BUILDERS: dict[str, tuple[Callable[..., nn.Module], Callable[..., nn.Module] | None]] = {}
_ARCH_ATTR = "_jostle_architecture"


def register_architecture(name: str, builder: Callable[..., nn.Module],
                          maker: Callable[..., nn.Module] | None = None) -> None:
    """Register ``builder(**kwargs) -> nn.Module`` under ``name`` so that files can rebuild it.

    The builder's keyword arguments must be JSON-serialisable. Modules it returns are tagged
    with ``{"builder": name, "kwargs": kwargs}`` by :func:`build_architecture`. ``maker``, if
    given, is the public function that checks its arguments and returns the tagged module (as
    :func:`mlp` and :func:`cnn` do); sweeps build architectures by name through it.
    """
    if not isinstance(name, str) or not name:
        raise ValueError(f"name must be a non-empty string; got {name!r}")
    _BUILDERS[name] = (builder, maker)


def architecture_maker(name: str) -> Callable[..., nn.Module]:
    """The checked public function of registered architecture ``name`` (``mlp`` -> :func:`mlp`)."""
    makers = {n: maker for n, (_, maker) in _BUILDERS.items() if maker is not None}
    if name not in makers:
        known = ", ".join(repr(n) for n in sorted(makers)) or "none"
        raise ValueError(f"must name a registered builder with a checked function ({known}); got {name!r}")
    return makers[name]


def build_architecture(name: str, **kwargs: Any) -> nn.Module:
    """Build a registered architecture and tag it so it can be saved and rebuilt."""
    if name not in _BUILDERS:
        known = ", ".join(sorted(_BUILDERS)) or "none"
        raise ValueError(f"architecture must be a registered builder ({known}); got {name!r}")
    module = _BUILDERS[name][0](**kwargs)
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


register_architecture("mlp", _build_mlp, maker=mlp)

POOLS: dict[str, Callable[[], nn.Module]] = {
    "max": lambda: nn.MaxPool2d(2),
    "avg": lambda: nn.AvgPool2d(2),
}
NORMS = (None, "layer", "group", "batch")


class ImageView(nn.Module):
    """Reshape inputs to images ``(n, C, H, W)``: flat rows ``(n, C*H*W)`` (how jostle's data
    sets hold images) and images alike are accepted."""

    def __init__(self, shape: tuple[int, int, int]):
        super().__init__()
        self.shape = tuple(int(s) for s in shape)

    def forward(self, x: Tensor) -> Tensor:
        return x.reshape(x.shape[0], *self.shape)

    def extra_repr(self) -> str:
        return f"shape={self.shape}"


def cnn(
    in_shape: tuple[int, int, int] | list[int],
    classes: int,
    channels: tuple[int, ...] | list[int] = (16, 32),
    kernel: int = 3,
    pool: str = "max",
    norm: str | None = None,
    hidden: tuple[int, ...] | list[int] = (),
    dropout: float = 0.0,
    activation: str = "relu",
) -> nn.Sequential:
    """A small convolutional classifier for images ``(C, H, W)`` returning logits.

    Each block is ``Conv2d(kernel, padding=kernel // 2)`` (same size), an optional norm,
    the activation and a 2x2 pooling; then Flatten, hidden Linear layers and one Linear
    head. The first layer, :class:`ImageView`, takes flat rows ``(n, C*H*W)`` (as in
    ``jostle.datasets``) or images ``(n, C, H, W)``.

    Parameters
    ----------
    in_shape : (C, H, W)
        Image shape, e.g. ``data.image_shape`` ((1, 28, 28) greyscale, (3, 32, 32) colour).
    classes : int
        Number of output classes (>= 2).
    channels : sequence of int
        Output channels of each convolution block (at least one).
    kernel : int
        Odd square kernel size of every convolution.
    pool : {"max", "avg"}
        The 2x2 pooling after each block; H and W must stay >= 1.
    norm : {None, "layer", "group", "batch"}
        After each convolution: ``LayerNorm`` over (channels, H, W), ``GroupNorm`` (4 groups
        when the channels divide by 4, else 1), or ``BatchNorm2d`` (used in eval mode by
        every posterior; fitting it in training mode is not supported).
    hidden : sequence of int
        Widths of Linear layers between the features and the head.
    dropout : float
        Dropout probability after each block and each hidden activation (0 adds none).
    activation : str
        One of ``tanh``, ``relu``, ``gelu``, ``silu``, ``elu``, ``sigmoid``, ``softplus``.

    Examples
    --------
    >>> net = cnn((1, 28, 28), 10)
    >>> [type(layer).__name__ for layer in net]  # doctest: +NORMALIZE_WHITESPACE
    ['ImageView', 'Conv2d', 'ReLU', 'MaxPool2d', 'Conv2d', 'ReLU', 'MaxPool2d', 'Flatten', 'Linear']
    """
    if not isinstance(in_shape, (tuple, list)) or len(in_shape) != 3 or not all(
            isinstance(s, int) and not isinstance(s, bool) and s >= 1 for s in in_shape):
        raise ValueError(f"in_shape must be (channels, height, width) of positive integers; got {in_shape!r}")
    classes = check_int("classes", classes, low=2)
    channels = _widths("channels", channels, allow_empty=False)
    kernel = check_int("kernel", kernel, low=1)
    if kernel % 2 == 0:
        raise ValueError(f"kernel must be an odd integer >= 1 (padding kernel // 2 keeps the size); got {kernel}")
    check_choice("pool", pool, tuple(POOLS))
    if norm not in NORMS:
        raise ValueError(f"norm must be one of {list(NORMS)}; got {norm!r}")
    hidden = _widths("hidden", hidden, allow_empty=True)
    dropout = check_float("dropout", dropout, low=0.0, high=1.0, high_open=True)
    check_choice("activation", activation, tuple(ACTIVATIONS))
    height, width = in_shape[1], in_shape[2]
    for _ in channels:
        height, width = height // 2, width // 2
    if height < 1 or width < 1:
        raise ValueError(f"in_shape {tuple(in_shape)} is too small for {len(channels)} 2x2 poolings; "
                         f"height and width must be >= {2 ** len(channels)}")
    return build_architecture(
        "cnn", in_shape=list(in_shape), classes=classes, channels=channels, kernel=kernel, pool=pool,
        norm=norm, hidden=hidden, dropout=dropout, activation=activation,
    )


def _widths(name: str, widths: Any, allow_empty: bool) -> list[int]:
    if isinstance(widths, int) or not isinstance(widths, (tuple, list)) or not all(
            isinstance(w, int) and not isinstance(w, bool) and w >= 1 for w in widths) or (
            not widths and not allow_empty):
        rule = "a sequence of positive integers" + ("" if allow_empty else " (at least one)")
        raise ValueError(f"{name} must be {rule}; got {widths!r}")
    return list(widths)


def _norm_layer(norm: str | None, channels: int, height: int, width: int) -> list[nn.Module]:
    if norm is None:
        return []
    if norm == "layer":
        return [nn.LayerNorm([channels, height, width])]
    if norm == "group":
        return [nn.GroupNorm(4 if channels % 4 == 0 else 1, channels)]
    return [nn.BatchNorm2d(channels)]


def _build_cnn(in_shape, classes, channels, kernel, pool, norm, hidden, dropout, activation) -> nn.Sequential:
    depth, height, width = in_shape
    layers: list[nn.Module] = [ImageView(tuple(in_shape))]
    for size in channels:
        layers.append(nn.Conv2d(depth, size, kernel, padding=kernel // 2))
        layers += _norm_layer(norm, size, height, width)
        layers += [ACTIVATIONS[activation](), POOLS[pool]()]
        if dropout > 0:
            layers.append(nn.Dropout(dropout))
        depth, height, width = size, height // 2, width // 2
    layers.append(nn.Flatten())
    features = depth * height * width
    for size in hidden:
        layers += [nn.Linear(features, size), ACTIVATIONS[activation]()]
        if dropout > 0:
            layers.append(nn.Dropout(dropout))
        features = size
    layers.append(nn.Linear(features, classes))
    return nn.Sequential(*layers)


register_architecture("cnn", _build_cnn, maker=cnn)


class DropoutMask(nn.Module):
    """A fixed dropout mask: ``h * keep / (1 - p)``, ``keep`` (0 drops, 1 keeps) shaped like one
    point's input (``(C, H, W)``, ``(C, 1, 1)`` for channel dropout, ``(features,)``) and shared
    by every point. An MC-dropout member is the network with each Dropout replaced by one of
    these; stacked over members, ``keep`` is a sampled input of the forward pass."""

    def __init__(self, shape: tuple[int, ...] | list[int], p: float):
        super().__init__()
        self.p = float(p)
        self.register_buffer("keep", torch.ones(tuple(int(s) for s in shape)))

    def forward(self, h: Tensor) -> Tensor:
        return h * (self.keep / (1.0 - self.p))

    def extra_repr(self) -> str:
        return f"shape={tuple(self.keep.shape)}, p={self.p}"


def with_dropout_masks(module: nn.Module, sites: list[dict]) -> nn.Module:
    """A copy of ``module`` with the submodule at each ``site["path"]`` replaced by a
    :class:`DropoutMask` of ``site["shape"]`` and rate ``site["p"]``. A module built by a
    registered builder gives one tagged ``dropout_masks``, so saved members rebuild on load."""
    arch = architecture_of(module)
    if arch is not None:
        return build_architecture("dropout_masks", base=arch, sites=[dict(site) for site in sites])
    return _replace_sites(copy.deepcopy(module), sites)


def _replace_sites(module: nn.Module, sites: list[dict]) -> nn.Module:
    for site in sites:
        parent_path, _, child = site["path"].rpartition(".")
        parent = module.get_submodule(parent_path) if parent_path else module
        setattr(parent, child, DropoutMask(site["shape"], site["p"]))
    return module


def _build_dropout_masks(base: dict, sites: list[dict]) -> nn.Module:
    return _replace_sites(build_architecture(base["builder"], **base["kwargs"]), sites)


register_architecture("dropout_masks", _build_dropout_masks)


@torch.no_grad()
def init_parameters(module: nn.Module, generator: torch.Generator) -> nn.Module:
    """Re-draw every Linear and Conv2d layer's weights with PyTorch's default scheme, from ``generator``.

    PyTorch's own initialisers draw from the global RNG; this keeps seeding explicit.
    Weights and biases are U(-1/sqrt(fan_in), 1/sqrt(fan_in)), which is what
    ``nn.Linear.reset_parameters`` and ``nn.Conv2d.reset_parameters`` give (kaiming_uniform
    with a = sqrt(5)); fan_in of a convolution is in_channels / groups * kernel area.
    Norm layers keep their weights (ones and zeros by default).
    """
    for layer in module.modules():
        if isinstance(layer, (nn.Linear, nn.Conv2d)):
            fan_in = layer.weight[0].numel()
            bound = 1.0 / math.sqrt(fan_in)
            device = layer.weight.device
            weight = torch.rand(layer.weight.shape, generator=generator, dtype=layer.weight.dtype)
            layer.weight.copy_((weight * 2 - 1).mul_(bound).to(device))
            if layer.bias is not None:
                bias = torch.rand(layer.bias.shape, generator=generator, dtype=layer.bias.dtype)
                layer.bias.copy_((bias * 2 - 1).mul_(bound).to(device))
    return module
