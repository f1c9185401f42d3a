"""The batched pass of convolutional stacks: members side by side as channel blocks.

A chain of ``Conv2d``, pooling, BatchNorm (eval), GroupNorm, LayerNorm, elementwise
activations, ``Flatten`` and ``Linear`` layers is evaluated for ``s`` members at once with
the members' channels stacked: a hidden image batch ``[n, s*c, h, w]`` holds member j's
channels in block j. A convolution of a shared input (the first layer) is one
convolution against all members' filters side by side (``[s*o, C, k, k]``); a
convolution of stacked channels is a grouped convolution with ``groups = s * groups``;
pooling and activations act per channel already; the norms are applied per member
block. After ``Flatten`` the features are ``[s, n, f]`` and Linear layers are batched
matrix products. With ``s = 1`` this is the plain network, so the same chain also serves
a loop over members (the size rule in :class:`jostle.posterior.forward.ConvPlan`).
"""
from __future__ import annotations

import copy

import torch
from torch import Tensor, nn
from torch.nn import functional

from jostle.posterior.activations import ELEMENTWISE, is_identity
from jostle.posterior.architectures import DropoutMask

__all__ = ["conv_steps", "conv_forward", "activation_sizes"]

_POOLS = (nn.MaxPool2d, nn.AvgPool2d)


def conv_steps(template: nn.Module) -> tuple[list[tuple], tuple[int, int, int] | None] | None:
    """The chain's steps and the input image shape it names (None if not named), or None
    when ``template`` is not a Sequential of supported layers holding a Conv2d."""
    if not isinstance(template, nn.Sequential):
        return None
    steps: list[tuple] = []
    shape = None
    flat = False
    for index, (name, layer) in enumerate(template.named_children()):
        step = _step(name, layer, flat)
        if step is None and index == 0:
            shape = _image_shape(layer)
            if shape is not None:
                continue
        if step is None:
            return None
        if step[0] == "skip":
            continue
        flat = flat or step[0] == "flatten"
        steps.append(step)
    kinds = [step[0] for step in steps]
    if "conv" not in kinds or "flatten" not in kinds or kinds.index("conv") > kinds.index("flatten"):
        return None
    return steps, shape


def _image_shape(layer: nn.Module) -> tuple[int, int, int] | None:
    shape = getattr(layer, "shape", None) if type(layer).__name__ == "ImageView" else None
    if isinstance(layer, nn.Unflatten) and layer.dim == 1:
        shape = tuple(layer.unflattened_size)
    return tuple(int(s) for s in shape) if shape is not None and len(shape) == 3 else None


def _step(name: str, layer: nn.Module, flat: bool) -> tuple | None:
    if is_identity(layer):
        return ("skip",)
    if isinstance(layer, nn.Conv2d) and not flat and layer.padding_mode == "zeros" and not isinstance(
            layer.padding, str):
        bias = f"{name}.bias" if layer.bias is not None else None
        return ("conv", f"{name}.weight", bias, layer.stride, layer.padding, layer.dilation, layer.groups)
    if isinstance(layer, _POOLS) and not flat:
        return ("pool", layer)
    if isinstance(layer, nn.BatchNorm2d) and not flat and not layer.training and layer.track_running_stats:
        return ("batchnorm", name, layer.eps, layer.affine)
    if isinstance(layer, nn.GroupNorm) and not flat:
        return ("groupnorm", name, layer.num_groups, layer.eps, layer.affine)
    if isinstance(layer, nn.LayerNorm) and (not flat or len(layer.normalized_shape) == 1):
        has_bias = layer.elementwise_affine and layer.bias is not None
        return ("layernorm", name, tuple(layer.normalized_shape), layer.eps, layer.elementwise_affine, has_bias)
    if isinstance(layer, nn.Flatten) and not flat and layer.start_dim == 1 and layer.end_dim == -1:
        return ("flatten",)
    if isinstance(layer, nn.Linear) and flat:
        return ("linear", f"{name}.weight", f"{name}.bias" if layer.bias is not None else None)
    if isinstance(layer, DropoutMask):
        return ("mask", f"{name}.keep", layer.p)
    if isinstance(layer, ELEMENTWISE) and not isinstance(layer, nn.Dropout):
        return ("map", layer)
    return None


def activation_sizes(template: nn.Module, shape: tuple[int, ...]) -> list[int]:
    """Floats per image of the input and after each layer of ``template`` for one member
    (a probe on the meta device: no memory, no arithmetic)."""
    probe = copy.deepcopy(template).to_empty(device="meta")
    dtype = next((p.dtype for p in probe.parameters() if p.is_floating_point()), torch.float32)
    h = torch.empty((1, *shape), device="meta", dtype=dtype)
    sizes = [int(h[0].numel())]
    first = next(iter(probe.children()), None)
    if isinstance(first, nn.Unflatten):  # it takes the flat rows it unflattens
        h = h.flatten(1)
    for layer in probe.children():
        h = layer(h)
        sizes.append(int(h[0].numel()))
    return sizes


def conv_forward(steps: list[tuple], params: dict[str, Tensor], x: Tensor, shape: tuple[int, int, int],
                 per_member: bool = False, channels_last: bool = True) -> Tensor:
    """Logits [s, n, C] of ``s`` members (module docstring); ``x`` is [n, ...] shared, or with
    ``per_member`` [s, n, ...]. ``channels_last`` lays the images out NHWC after every
    convolution, which the CPU pooling and convolution kernels run several times faster on
    (measured, :mod:`jostle.posterior.forward`)."""
    members = int(next(iter(params.values())).shape[0])
    if per_member:
        n = x.shape[1]
        h = x.reshape(members, n, *shape).transpose(0, 1).reshape(n, members * shape[0], *shape[1:])
    else:
        n = x.shape[0]
        h = x.reshape(n, *shape)
    if channels_last:
        h = h.contiguous(memory_format=torch.channels_last)
    shared = not per_member
    for step in steps:
        kind = step[0]
        if kind == "conv":
            h = _conv(step, params, h, members, shared, channels_last)
            shared = False
            continue
        if shared and kind in ("batchnorm", "groupnorm", "layernorm", "mask"):
            h = h.repeat(1, members, 1, 1)
            shared = False
        if kind == "flatten":
            h = h.reshape(n, members, -1).transpose(0, 1) if not shared else h.reshape(n, -1).expand(members, n, -1)
            shared = False
        elif kind == "linear":
            h = _linear(params[step[1]], None if step[2] is None else params[step[2]], h)
        elif kind == "mask":
            h = _masked(params[step[1]], step[2], h)
        elif kind == "map" or kind == "pool":
            h = step[1](h)
        else:
            h = _NORMS[kind](step, params, h, members)
    return h


def _conv(step: tuple, params: dict[str, Tensor], h: Tensor, members: int, shared: bool,
          channels_last: bool) -> Tensor:
    _, weight_name, bias_name, stride, padding, dilation, groups = step
    weight = params[weight_name]
    filters = weight.reshape(-1, *weight.shape[2:])
    bias = None if bias_name is None else params[bias_name].reshape(-1)
    if shared and groups > 1:
        h, shared = h.repeat(1, members, 1, 1), False
    out = functional.conv2d(h, filters, bias, stride, padding, dilation, groups if shared else groups * members)
    # a one-channel input is ambiguous, and its convolution comes back NCHW
    return out.contiguous(memory_format=torch.channels_last) if channels_last else out


def _linear(weight: Tensor, bias: Tensor | None, h: Tensor) -> Tensor:
    if bias is None:
        return torch.bmm(h, weight.transpose(1, 2))
    return torch.baddbmm(bias.unsqueeze(1), h, weight.transpose(1, 2))


def _masked(keep: Tensor, p: float, h: Tensor) -> Tensor:
    """Each member's fixed dropout mask [s, *shape] on ``h`` [n, s*c, h, w] or [s, n, f]."""
    scale = keep / (1.0 - p)
    if h.dim() == 4:
        return h * scale.reshape(1, -1, *scale.shape[2:])
    return h * scale.unsqueeze(1)


def _per_channel(values: Tensor, h: Tensor) -> Tensor:
    """[s, c] per-member channel values broadcast over ``h``: [n, s*c, h, w] or [s, n, c]."""
    return values.reshape(1, -1, 1, 1) if h.dim() == 4 else values.unsqueeze(1)


def _batchnorm(step: tuple, params: dict[str, Tensor], h: Tensor, members: int) -> Tensor:
    _, name, eps, affine = step
    scale = torch.rsqrt(params[f"{name}.running_var"] + eps)
    if affine:
        scale = scale * params[f"{name}.weight"]
    shift = -params[f"{name}.running_mean"] * scale
    if affine:
        shift = shift + params[f"{name}.bias"]
    return torch.addcmul(_per_channel(shift, h), h, _per_channel(scale, h))


def _groupnorm(step: tuple, params: dict[str, Tensor], h: Tensor, members: int) -> Tensor:
    _, name, groups, eps, affine = step
    out = functional.group_norm(h, groups * members, None, None, eps)
    if not affine:
        return out
    return torch.addcmul(_per_channel(params[f"{name}.bias"], h), out, _per_channel(params[f"{name}.weight"], h))


def _layernorm(step: tuple, params: dict[str, Tensor], h: Tensor, members: int) -> Tensor:
    _, name, normalized, eps, affine, has_bias = step
    if h.dim() == 4:  # [n, s*c, h, w] -> [n, s, c, h, w], normalised over its last dims
        blocks = h.reshape(h.shape[0], members, -1, *h.shape[2:])
        expand = (1, members) + (1,) * (3 - len(normalized)) + normalized
    else:  # [s, n, f]
        blocks = h
        expand = (members, 1) + normalized
    out = functional.layer_norm(blocks, normalized, None, None, eps)
    if affine:
        out = out * params[f"{name}.weight"].reshape(expand)
        if has_bias:
            out = out + params[f"{name}.bias"].reshape(expand)
    return out.reshape(h.shape) if h.dim() == 4 else out


_NORMS = {"batchnorm": _batchnorm, "groupnorm": _groupnorm, "layernorm": _layernorm}
