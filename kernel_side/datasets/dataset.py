"""The :class:`Dataset` record and :func:`from_arrays`, which every loader ends in."""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from torch import Tensor

from jostle.common.checks import as_float_tensor, as_label_tensor, show_value

__all__ = ["Dataset", "from_arrays", "pixel_names"]


@dataclass(frozen=True)
class Dataset:
    """Train and test arrays with the facts downstream code needs.

    Attributes
    ----------
    x_train, x_test : Tensor of shape (n_points, n_features), float32
        Images are flattened in row-major ``(C, H, W)`` order.
    y_train, y_test : Tensor of shape (n_points,), int64
    classes : list of str
        Class names, indexed by label.
    name : str
    bounds : (Tensor, Tensor) of shape (n_features,) each
        The input box attacks must stay inside (``lo <= x <= hi``); ``(0, 1)`` for images.
    image_shape : tuple of int or None
        ``(C, H, W)`` for images (``(1, 8, 8)`` for digits, ``(3, 28, 28)`` for colour
        meter cards); None for feature vectors.
    feature_names : list of str
    """

    x_train: Tensor
    y_train: Tensor
    x_test: Tensor
    y_test: Tensor
    classes: list[str]
    name: str
    bounds: tuple[Tensor, Tensor]
    image_shape: tuple[int, ...] | None = None
    feature_names: list[str] = field(default_factory=list)

    @property
    def n_features(self) -> int:
        return int(self.x_train.shape[1])

    @property
    def n_classes(self) -> int:
        return len(self.classes)

    def describe(self) -> dict:
        """A JSON-friendly record (stored in posterior metadata)."""
        return {
            "name": self.name,
            "classes": list(self.classes),
            "bounds": [self.bounds[0].tolist(), self.bounds[1].tolist()],
            "image_shape": list(self.image_shape) if self.image_shape else None,
            "feature_names": list(self.feature_names),
            "n_train": int(self.x_train.shape[0]),
            "n_test": int(self.x_test.shape[0]),
        }

    def __repr__(self) -> str:
        shape = f", image_shape={self.image_shape}" if self.image_shape else ""
        return (
            f"Dataset(name={self.name!r}, n_train={self.x_train.shape[0]}, n_test={self.x_test.shape[0]}, "
            f"n_features={self.n_features}{shape}, classes={self.classes!r})"
        )


def from_arrays(
    x_train: Any,
    y_train: Any,
    x_test: Any,
    y_test: Any,
    classes: Sequence[str] | None = None,
    name: str = "custom",
    bounds: tuple[Any, Any] | None = None,
    image_shape: tuple[int, ...] | None = None,
    feature_names: Sequence[str] | None = None,
) -> Dataset:
    """Wrap your own arrays as a :class:`Dataset`, checking shapes, values and labels.

    ``bounds`` defaults to the data's range widened by half its span on each side.
    ``image_shape`` is ``(C, H, W)``; ``(H, W)`` is read as ``(1, H, W)``. A float32
    tensor is used as it is, not copied.
    """
    xtr = as_float_tensor("x_train", x_train, ndim=2)
    xte = as_float_tensor("x_test", x_test, ndim=2)
    if xte.shape[1] != xtr.shape[1]:
        raise ValueError(f"x_test must have {xtr.shape[1]} features like x_train; got {xte.shape[1]}")
    if xtr.shape[0] == 0:
        raise ValueError("x_train must hold at least one point; got 0")
    ytr_raw = as_label_tensor("y_train", y_train, n_points=xtr.shape[0])
    n_classes = len(classes) if classes is not None else int(ytr_raw.max()) + 1
    ytr = as_label_tensor("y_train", ytr_raw, n_points=xtr.shape[0], classes=n_classes)
    yte = as_label_tensor("y_test", y_test, n_points=xte.shape[0], classes=n_classes)
    if classes is None:
        classes = [str(c) for c in range(n_classes)]
    classes = [str(c) for c in classes]
    if n_classes < 2:
        raise ValueError(f"classes must name at least 2 classes; got {classes!r}")
    lo, hi = _bounds(bounds, xtr, xte)
    if _outside(xtr, lo, hi) or _outside(xte, lo, hi):
        raise ValueError("bounds must contain every point of x_train and x_test; some lie outside")
    image_shape = _image_shape(image_shape, xtr.shape[1])
    if feature_names is None:
        feature_names = pixel_names(image_shape) if image_shape else [f"x{i + 1}" for i in range(xtr.shape[1])]
    feature_names = [str(f) for f in feature_names]
    if len(feature_names) != xtr.shape[1]:
        raise ValueError(f"feature_names must name {xtr.shape[1]} features; got {len(feature_names)}")
    return Dataset(xtr, ytr, xte, yte, classes, str(name), (lo, hi), image_shape, feature_names)


def pixel_names(image_shape: tuple[int, int, int]) -> list[str]:
    """Feature names of a flattened ``(C, H, W)`` image: ``pixel r,c``, or ``red r,c`` etc. for colour."""
    channels, height, width = image_shape
    if channels == 1:
        prefixes = ["pixel"]
    elif channels == 3:
        prefixes = ["red", "green", "blue"]
    else:
        prefixes = [f"channel {k}" for k in range(channels)]
    return [f"{p} {r},{c}" for p in prefixes for r in range(height) for c in range(width)]


def _image_shape(image_shape: Any, n_features: int) -> tuple[int, int, int] | None:
    if image_shape is None:
        return None
    try:
        shape = tuple(int(s) for s in image_shape)
    except (TypeError, ValueError):
        raise ValueError(f"image_shape must be (H, W) or (C, H, W); got {show_value(image_shape)}") from None
    if len(shape) not in (2, 3) or min(shape) < 1:
        raise ValueError(f"image_shape must be (H, W) or (C, H, W) of positive sizes; got {shape}")
    if int(np.prod(shape)) != n_features:
        raise ValueError(f"image_shape {shape} must multiply to n_features = {n_features}")
    return shape if len(shape) == 3 else (1, *shape)


def _outside(x: Tensor, lo: Tensor, hi: Tensor) -> bool:
    return bool((x.amin(0) < lo).any() or (x.amax(0) > hi).any()) if x.shape[0] else False


def _bounds(bounds, xtr: Tensor, xte: Tensor) -> tuple[Tensor, Tensor]:
    d = xtr.shape[1]
    if bounds is None:
        # column extremes of each part, so a large image set is never concatenated into a second copy
        parts = [x for x in (xtr, xte) if x.shape[0]]
        low = torch.stack([x.amin(0) for x in parts]).amin(0)
        high = torch.stack([x.amax(0) for x in parts]).amax(0)
        span = (high - low).clamp_min(1e-6)
        return low - span / 2, high + span / 2
    if not isinstance(bounds, (tuple, list)) or len(bounds) != 2:
        raise ValueError(f"bounds must be a pair (lo, hi); got {bounds!r}")
    lo = as_float_tensor("bounds[0]", bounds[0], ndim=(0, 1))
    hi = as_float_tensor("bounds[1]", bounds[1], ndim=(0, 1))
    lo, hi = lo.expand(d).clone(), hi.expand(d).clone()
    if bool((lo >= hi).any()):
        raise ValueError(f"bounds must have lo < hi in every feature; got lo={lo.tolist()}, hi={hi.tolist()}")
    return lo, hi
