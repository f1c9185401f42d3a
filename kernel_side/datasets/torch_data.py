"""Data sets from any ``torch.utils.data.Dataset`` of (input, label) pairs."""
from __future__ import annotations

from collections.abc import Sequence
from numbers import Integral
from typing import Any

import numpy as np
import torch
from torch import Tensor

from jostle.common.checks import show_value
from jostle.datasets.arrays import check_unit_range, class_names
from jostle.datasets.dataset import Dataset, from_arrays

__all__ = ["from_torch"]


def from_torch(train_dataset: Any, test_dataset: Any, classes: Sequence[str] | None = None) -> Dataset:
    """Copy a map-style ``torch.utils.data.Dataset`` pair into a :class:`Dataset`.

    Parameters
    ----------
    train_dataset, test_dataset : map-style datasets
        Anything with ``len()`` and ``ds[i] -> (input, label, ...)``. An input is a tensor or
        array of shape ``(C, H, W)`` or ``(H, W)`` (an image) or ``(D,)`` (a feature vector),
        or a Pillow image. Labels are integers (or 0-d integer tensors).
    classes : sequence of str, optional
        Class names by label; default the training set's ``classes`` attribute when it
        names every label (as torchvision's folders do), else ``"0" ... "K-1"``.

    Returns
    -------
    Dataset
        Images: bytes scaled by 1/255, float images kept (they must lie in [0, 1], so leave
        normalisation out of the transform), ``image_shape = (C, H, W)``, bounds ``(0, 1)``.
        Vectors keep their values. Each item is written straight into one preallocated array.

    Raises
    ------
    ValueError
        A dataset without ``len`` or indexing, an item that is not a pair, inputs of
        differing shapes (naming the item), non-integer labels, or float images outside [0, 1].
    """
    first = _first(train_dataset, "train_dataset")
    _first(test_dataset, "test_dataset")
    shape, scale = _layout(first, "train_dataset[0]")
    x_train, y_train = _copy(train_dataset, "train_dataset", first.dtype, shape, scale)
    x_test, y_test = _copy(test_dataset, "test_dataset", first.dtype, shape, scale)
    image = len(shape) > 1
    if image:
        check_unit_range("train_dataset and test_dataset", x_train, x_test)
    found = getattr(train_dataset, "classes", None)
    top = int(max(y_train.max(), y_test.max() if y_test.size else 0))
    if not (isinstance(found, (list, tuple)) and len(found) > top and all(isinstance(c, str) for c in found)):
        found = None
    if classes is None and found is not None:
        names = list(found)
    else:
        names = class_names(classes, None, [y_train, y_test], "train_dataset")
    image_shape = (shape if len(shape) == 3 else (1, *shape)) if image else None
    return from_arrays(x_train, y_train, x_test, y_test, classes=names, name=type(train_dataset).__name__,
                       bounds=(0.0, 1.0) if image else None, image_shape=image_shape)


def _first(dataset: Any, name: str) -> Any:
    if not (hasattr(dataset, "__len__") and hasattr(dataset, "__getitem__")):
        raise ValueError(f"{name} must be a map-style torch.utils.data.Dataset (with len() and indexing); "
                         f"got {type(dataset).__name__}")
    if len(dataset) == 0:
        raise ValueError(f"{name} must hold at least one item; got an empty {type(dataset).__name__}")
    return _input(dataset[0], f"{name}[0]")


def _input(item: Any, where: str) -> np.ndarray:
    if not isinstance(item, (tuple, list)) or len(item) < 2:
        raise ValueError(f"{where} must be a pair (input, label); got {show_value(item)}")
    x = item[0]
    if isinstance(x, Tensor):
        return x.detach().cpu().numpy()
    if hasattr(x, "mode") and hasattr(x, "size") and hasattr(x, "getdata"):  # a Pillow image
        array = np.asarray(x)
        return array if array.ndim == 2 else array.transpose(2, 0, 1)
    try:
        return np.asarray(x)
    except (TypeError, ValueError):
        raise ValueError(f"{where} must hold a tensor, array or Pillow image as input; got {show_value(x)}") from None


def _layout(x: np.ndarray, where: str) -> tuple[tuple[int, ...], float]:
    if x.ndim not in (1, 2, 3) or x.size == 0:
        raise ValueError(f"{where} must hold an input of shape (D,), (H, W) or (C, H, W); got shape {x.shape}")
    if x.dtype == np.uint8:
        return tuple(x.shape), 1.0 / 255.0
    if x.dtype.kind in "fb" or (x.dtype.kind in "iu" and x.ndim == 1):
        return tuple(x.shape), 1.0
    raise ValueError(f"{where} must hold uint8 or float inputs (integer images must be uint8); got dtype {x.dtype}")


def _copy(dataset: Any, name: str, dtype: np.dtype, shape: tuple[int, ...],
          scale: float) -> tuple[Tensor, np.ndarray]:
    out = np.empty((len(dataset), int(np.prod(shape))), dtype=np.float32)
    labels = np.empty(len(dataset), dtype=np.int64)
    for k in range(len(dataset)):
        item = dataset[k]
        x = _input(item, f"{name}[{k}]")
        if tuple(x.shape) != shape:
            raise ValueError(f"{name}[{k}] has an input of shape {tuple(x.shape)} but train_dataset[0] has {shape}; "
                             f"every input must have one shape")
        if x.dtype != dtype:
            raise ValueError(f"{name}[{k}] has an input of dtype {x.dtype} but train_dataset[0] has {dtype}; "
                             f"every input must have one dtype (bytes are scaled by 1/255, floats are not)")
        out[k] = x.reshape(-1)
        labels[k] = _label(item[1], f"{name}[{k}]")
    if scale != 1.0:
        out /= np.float32(255.0)
    return torch.from_numpy(out), labels


def _label(y: Any, where: str) -> int:
    if isinstance(y, Tensor) and y.numel() == 1 and not y.is_floating_point() and not y.is_complex():
        y = int(y.item())
    elif isinstance(y, np.ndarray) and y.size == 1 and y.dtype.kind in "iu":
        y = int(y.reshape(()))
    if isinstance(y, bool) or not isinstance(y, Integral) or int(y) < 0:
        raise ValueError(f"{where} must hold a class label, an integer >= 0; got {show_value(y)}")
    return int(y)
