"""Network functions that sweep tests name as ``tests.kernel_side.sweep_models:<function>``."""
from __future__ import annotations

import torch
from torch import nn
from torch.utils.data import TensorDataset

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


def digit_pair(count: int = 100, test_share: float = 0.25):
    """scikit-learn's bundled 8x8 digits as a (train, test) pair of torch TensorDatasets of
    (1, 8, 8) images in [0, 1]; the last ``test_share`` of the first ``count`` are the test set."""
    from sklearn.datasets import load_digits

    bunch = load_digits()
    images = torch.tensor(bunch.images[:count] / 16.0, dtype=torch.float32).unsqueeze(1)
    labels = torch.tensor(bunch.target[:count], dtype=torch.int64)
    cut = count - int(round(test_share * count))
    return TensorDataset(images[:cut], labels[:cut]), TensorDataset(images[cut:], labels[cut:])


def one_dataset(count: int = 10):
    """Only a training set: a sweep naming it is refused (it must return a pair)."""
    return digit_pair(count)[0]
