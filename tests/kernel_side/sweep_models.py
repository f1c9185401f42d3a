"""Network functions that sweep tests name as ``tests.kernel_side.sweep_models:<function>``."""
from __future__ import annotations

from torch import nn

#: not callable: a sweep naming it is refused
NOT_CALLABLE = 3


def plain_mlp(in_features: int, classes: int, width: int = 8) -> nn.Module:
    """One tanh hidden layer, the layers jostle.mlp(in_features, classes, hidden=(width,)) has."""
    return nn.Sequential(nn.Linear(in_features, width), nn.Tanh(), nn.Linear(width, classes))


def image_net(in_shape: list, classes: int, channels: int = 4) -> nn.Module:
    """A small convolutional net for flat image rows, unflattened to ``in_shape`` first."""
    depth, height, width = in_shape
    return nn.Sequential(nn.Unflatten(1, tuple(in_shape)), nn.Conv2d(depth, channels, 3, padding=1), nn.ReLU(),
                         nn.Flatten(), nn.Linear(channels * height * width, classes))


def not_a_module(in_features: int, classes: int) -> dict:
    """Returns the layer sizes instead of a network: a sweep naming it is refused."""
    return {"in_features": in_features, "classes": classes}
