"""An ensemble's template read as a chain of layers the bound propagation understands.

Each :class:`Step` holds one layer with its parameters stacked over members (``[S, ...]``),
and the shapes per point of what goes in and what comes out. Tensors that flow between
steps have shape ``[S, B, *shape]``: members first, then points (or points times bound
rows), then the layer's own shape. The affine steps also give their transpose, which the
linear bounds run backwards.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch
import torch.nn.functional as F
from torch import Tensor, nn

from jostle.posterior.architectures import ImageView

__all__ = ["Step", "Chain", "read_chain", "AFFINE", "ELEMENTWISE", "SUPPORTED"]

AFFINE = ("linear", "conv", "avgpool", "flatten")
ELEMENTWISE = ("relu", "tanh", "sigmoid")
_KINDS: dict[type, str] = {
    nn.Linear: "linear", nn.Conv2d: "conv", nn.AvgPool2d: "avgpool", nn.Flatten: "flatten", ImageView: "flatten",
    nn.ReLU: "relu", nn.Tanh: "tanh", nn.Sigmoid: "sigmoid", nn.MaxPool2d: "maxpool",
}
_PASS_THROUGH = (nn.Identity, nn.Dropout)
SUPPORTED = ("Linear, Conv2d, ReLU, Tanh, Sigmoid, MaxPool2d, AvgPool2d, Flatten, jostle.cnn's ImageView "
             "(and Identity, Dropout in eval mode)")


@dataclass
class Step:
    """One layer: its kind, where it sits in the template, its stacked parameters and shapes."""

    kind: str
    name: str
    module: nn.Module
    weight: Tensor | None
    bias: Tensor | None
    in_shape: tuple[int, ...]
    out_shape: tuple[int, ...]

    @property
    def affine(self) -> bool:
        return self.kind in AFFINE

    def apply(self, z: Tensor, with_bias: bool = True) -> Tensor:
        """The layer on ``z`` [S or 1, B, *in_shape] -> [S, B, *out_shape] (member s uses its own weights)."""
        if self.kind == "linear":
            out = torch.einsum("sbi,soi->sbo", z.expand(self._members(z), *z.shape[1:]), self.weight)
            return out + self.bias[:, None] if (with_bias and self.bias is not None) else out
        if self.kind == "conv":
            return self._conv(z, self.weight, self.bias if with_bias else None)
        if self.kind == "flatten":  # nn.Flatten, or ImageView (flat rows to images): a reshape either way
            return z.reshape(*z.shape[:2], *getattr(self.module, "shape", (-1,)))
        folded = z.reshape(-1, *self.in_shape)
        if self.kind == "avgpool":
            out = F.avg_pool2d(folded, **_pool_options(self.module, average=True))
        elif self.kind == "maxpool":
            out = F.max_pool2d(folded, **_pool_options(self.module, average=False))
        else:
            out = _ELEMENTWISE_FUNCTIONS[self.kind](folded)
        return out.reshape(*z.shape[:2], *out.shape[1:])

    def apply_abs(self, r: Tensor) -> Tensor:
        """``|A| r`` for the affine part ``A`` (no bias): the radius of an interval's image."""
        if self.kind == "linear":
            return torch.einsum("sbi,soi->sbo", r.expand(self._members(r), *r.shape[1:]), self.weight.abs())
        if self.kind == "conv":
            return self._conv(r, self.weight.abs(), None)
        return self.apply(r, with_bias=False)  # average pooling has non-negative weights; flatten is a copy

    def row_norms(self) -> Tensor | None:
        """L2 norm of each row of ``A`` as [S, 1, *out_shape] (Linear and Conv2d), else None."""
        if self.kind == "linear":
            return self.weight.square().sum(-1).sqrt()[:, None]
        if self.kind == "conv":
            ones = torch.ones(1, 1, *self.in_shape, dtype=self.weight.dtype, device=self.weight.device)
            return self._conv(ones, self.weight.square(), None).clamp_min(0).sqrt()
        return None

    def transpose(self, lam: Tensor) -> Tensor:
        """Row vectors through ``A``: ``lam`` [S, B, K, *out_shape] -> ``lam A`` [S, B, K, *in_shape]."""
        s, b, k = lam.shape[:3]
        if self.kind == "linear":
            return torch.einsum("sbko,soi->sbki", lam, self.weight)
        if self.kind == "flatten":
            return lam.reshape(s, b, k, *self.in_shape)
        # A linear map's vector-Jacobian product is its transpose applied to the vector.
        zero = torch.zeros(s, b * k, *self.in_shape, dtype=lam.dtype, device=lam.device)
        _, pull_back = torch.func.vjp(lambda z: self.apply(z, with_bias=False), zero)
        (out,) = pull_back(lam.reshape(s, b * k, *self.out_shape))
        return out.reshape(s, b, k, *self.in_shape)

    def bias_dot(self, lam: Tensor) -> Tensor | None:
        """``lam . bias`` [S, B, K], or None for a step without bias."""
        if self.bias is None or self.kind not in ("linear", "conv"):
            return None
        if self.kind == "linear":
            return torch.einsum("sbko,so->sbk", lam, self.bias)
        return torch.einsum("sbkc...,sc->sbk", lam, self.bias)

    def _members(self, z: Tensor) -> int:
        return max(int(z.shape[0]), int(self.weight.shape[0]))

    def _conv(self, z: Tensor, weight: Tensor, bias: Tensor | None) -> Tensor:
        members = self._members(z)
        z = z.expand(members, *z.shape[1:])
        points = z.shape[1]
        grouped = z.transpose(0, 1).reshape(points, members * self.in_shape[0], *self.in_shape[1:])
        conv: nn.Conv2d = self.module
        out = F.conv2d(grouped, weight.reshape(-1, *weight.shape[2:]),
                       None if bias is None else bias.reshape(-1), stride=conv.stride, padding=conv.padding,
                       dilation=conv.dilation, groups=members * conv.groups)
        return out.reshape(points, members, -1, *out.shape[2:]).transpose(0, 1)


@dataclass
class Chain:
    """The steps of one template, first to last, with the members' stacked parameters."""

    steps: list[Step]
    members: int

    def forward(self, x: Tensor) -> Tensor:
        """Logits [S, N, C] of every member at ``x`` [N, *input_shape] (a plain reference pass)."""
        z = x[None]
        for step in self.steps:
            z = step.apply(z)
        return z


def read_chain(template: nn.Module, params: dict[str, Tensor], input_shape: tuple[int, ...]) -> Chain:
    """Read ``template`` (an ``nn.Sequential`` of supported layers, or one such layer) as a :class:`Chain`.

    Raises
    ------
    ValueError
        If the template is not a chain of supported layers, naming the first layer that is not.
    """
    layers = _leaf_layers(template)
    steps: list[Step] = []
    shape = tuple(int(v) for v in input_shape)
    for name, layer in layers:
        if isinstance(layer, _PASS_THROUGH):
            continue
        kind = _KINDS[type(layer)]
        _check_options(name, layer, kind)
        weight = params.get(f"{name}.weight" if name else "weight") if kind in ("linear", "conv") else None
        bias = params.get(f"{name}.bias" if name else "bias") if kind in ("linear", "conv") else None
        step = Step(kind, name or type(layer).__name__, layer, weight, bias, shape, shape)
        members = 1 if weight is None else int(weight.shape[0])
        probe = torch.zeros(members, 1, *shape, dtype=_dtype(params), device=_device(params))
        try:
            step.out_shape = tuple(step.apply(probe).shape[2:])
        except RuntimeError as err:
            raise ValueError(f"layer {step.name!r} ({type(layer).__name__}) cannot take inputs of shape "
                             f"{shape}: {err}") from None
        steps.append(step)
        shape = step.out_shape
    if len(shape) != 1:
        raise ValueError(f"the template must end in logits of shape (n_classes,) per point; got shape {shape}")
    members = int(next(iter(params.values())).shape[0])
    return Chain(steps, members)


def _leaf_layers(template: nn.Module) -> list[tuple[str, nn.Module]]:
    if not isinstance(template, nn.Sequential):
        if type(template) in _KINDS:
            return [("", template)]
        raise ValueError(f"certify needs a template that is an nn.Sequential of {SUPPORTED}; "
                         f"got a template of type {type(template).__name__}")
    out: list[tuple[str, nn.Module]] = []
    for name, layer in template.named_children():
        if isinstance(layer, nn.Sequential):
            out += [(f"{name}.{inner}", sub) for inner, sub in _leaf_layers(layer)]
        elif type(layer) in _KINDS or isinstance(layer, _PASS_THROUGH):
            if isinstance(layer, nn.Dropout) and layer.training and layer.p > 0:
                raise ValueError(f"layer {name!r} is a Dropout in training mode; call .eval() on the template")
            out.append((name, layer))
        else:
            raise ValueError(f"certify supports layers {SUPPORTED}; layer {name!r} is a {type(layer).__name__}, "
                             f"which it does not support")
    return out


def _check_options(name: str, layer: nn.Module, kind: str) -> None:
    if kind == "conv" and layer.padding_mode != "zeros":
        raise ValueError(f"layer {name!r}: Conv2d padding_mode must be 'zeros' for certify; "
                         f"got {layer.padding_mode!r}")
    if kind == "conv" and isinstance(layer.padding, str):
        raise ValueError(f"layer {name!r}: Conv2d padding must be given as integers for certify; "
                         f"got {layer.padding!r}")
    if kind == "maxpool" and (layer.ceil_mode or layer.return_indices):
        raise ValueError(f"layer {name!r}: MaxPool2d must have ceil_mode=False and return_indices=False "
                         f"for certify; got ceil_mode={layer.ceil_mode}, return_indices={layer.return_indices}")
    if isinstance(layer, nn.Flatten) and (layer.start_dim != 1 or layer.end_dim != -1):
        raise ValueError(f"layer {name!r}: Flatten must flatten dims 1..-1 (the defaults) for certify; "
                         f"got start_dim={layer.start_dim}, end_dim={layer.end_dim}")


def _pool_options(module: nn.Module, average: bool) -> dict:
    options = {"kernel_size": module.kernel_size, "stride": module.stride, "padding": module.padding,
               "ceil_mode": module.ceil_mode}
    if average:
        options.update(count_include_pad=module.count_include_pad, divisor_override=module.divisor_override)
    else:
        options.update(dilation=module.dilation)
    return options


def _dtype(params: dict[str, Tensor]) -> torch.dtype:
    floats = [v for v in params.values() if v.is_floating_point()]
    return floats[0].dtype if floats else torch.float32


def _device(params: dict[str, Tensor]) -> torch.device:
    return next(iter(params.values())).device


_ELEMENTWISE_FUNCTIONS = {"relu": torch.relu, "tanh": torch.tanh, "sigmoid": torch.sigmoid}
