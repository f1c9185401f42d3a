"""What the file loaders share: seeded stratified splits, label codes, and pixel arrays
turned into float32 rows in [0, 1] with one conversion (never two full copies)."""
from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import torch
from torch import Tensor

from jostle.common.checks import check_float, check_seed, show_value

__all__ = ["stratified_split", "label_codes", "pixel_scale", "as_image_array", "fill_rows", "check_unit_range",
           "check_test_fraction", "class_names"]

#: rows converted per block, so a memory-mapped file is read piecewise and a block stays small
BLOCK_ROWS = 4096


def check_test_fraction(test_fraction: Any) -> float:
    return check_float("test_fraction", test_fraction, low=0.0, high=1.0, low_open=True, high_open=True)


def stratified_split(labels: np.ndarray, test_fraction: float, seed: int, where: str) -> tuple[np.ndarray, np.ndarray]:
    """Seeded train and test row indices holding ``test_fraction`` of every class, each in shuffled order.

    A class keeps at least one training point; the test set must not come out empty.
    """
    seed = check_seed(seed)
    generator = torch.Generator().manual_seed(seed)
    train, test = [], []
    for label in np.unique(labels):
        rows = np.flatnonzero(labels == label)
        rows = rows[torch.randperm(rows.size, generator=generator).numpy()]
        n_test = min(int(round(test_fraction * rows.size)), rows.size - 1)
        test.append(rows[:n_test])
        train.append(rows[n_test:])
    train_rows, test_rows = np.concatenate(train), np.concatenate(test)
    if test_rows.size == 0:
        raise ValueError(f"test_fraction {test_fraction} leaves no test points from the {labels.size} points "
                         f"of {where}; raise it or add data")
    # shuffled, so the first test images are not all of one class
    train_rows = train_rows[torch.randperm(train_rows.size, generator=generator).numpy()]
    test_rows = test_rows[torch.randperm(test_rows.size, generator=generator).numpy()]
    return train_rows, test_rows


def label_codes(y: np.ndarray, where: str) -> tuple[np.ndarray, list[str] | None]:
    """Integer labels from an array of ints (kept) or strings (sorted names, coded by position)."""
    y = np.asarray(y)
    if y.ndim != 1:
        raise ValueError(f"labels in {where} must be a 1-d array; got shape {y.shape}")
    if y.dtype.kind in "US":
        names, codes = np.unique(y, return_inverse=True)
        return codes.astype(np.int64), [str(n) for n in names]
    if y.dtype.kind not in "biu":
        raise ValueError(f"labels in {where} must be integers or strings; got dtype {y.dtype}")
    if y.size and int(y.min()) < 0:
        raise ValueError(f"labels in {where} must be >= 0; got {int(y.min())}")
    return y.astype(np.int64), None


def class_names(classes: Sequence[str] | None, found: list[str] | None, labels: Sequence[np.ndarray],
                where: str) -> list[str]:
    """The class names: given, found in the file, or ``"0" ... "K-1"`` from the largest label."""
    top = max((int(y.max()) for y in labels if y.size), default=0)
    if classes is None:
        return found if found is not None else [str(k) for k in range(top + 1)]
    if isinstance(classes, str) or not all(isinstance(c, str) for c in classes):
        raise ValueError(f"classes must be a sequence of names (str); got {show_value(classes)}")
    names = list(classes)
    if found is not None and sorted(names) != found:
        raise ValueError(f"classes must be the label names in {where}, {found}, in any order; got {names}")
    if len(names) <= top:
        raise ValueError(f"classes must name every label in {where} (0..{top}); got {len(names)} names")
    return names


def pixel_scale(array: np.ndarray, where: str) -> float:
    """The factor taking stored pixels to [0, 1]: 1/255 for bytes, 1 for floats already in [0, 1]."""
    if array.dtype == np.uint8:
        return 1.0 / 255.0
    if array.dtype == np.bool_:
        return 1.0
    if array.dtype.kind in "iu":
        low, high = (int(array.min()), int(array.max())) if array.size else (0, 0)
        if low < 0 or high > 255:
            raise ValueError(f"integer images in {where} must hold values 0..255; got {low}..{high}")
        return 1.0 / 255.0
    if array.dtype.kind == "f":
        return 1.0
    raise ValueError(f"images in {where} must be integers 0..255 or floats in [0, 1]; got dtype {array.dtype}")


def as_image_array(x: np.ndarray, where: str) -> tuple[np.ndarray, tuple[int, int, int] | None]:
    """A view of stored points in ``(N, C, H, W)`` order and the image shape (None for 2-d feature tables).

    ``(N, H, W)`` is greyscale; a 4-d array is ``(N, C, H, W)`` unless only its last axis is
    1, 3 or 4 long, when it is read as channels last ``(N, H, W, C)`` and transposed (a view).
    """
    if x.ndim == 2:
        return x, None
    if x.ndim == 3:
        return x[:, None], (1, int(x.shape[1]), int(x.shape[2]))
    if x.ndim == 4:
        if x.shape[3] in (1, 3, 4) and x.shape[1] not in (1, 3, 4):
            x = x.transpose(0, 3, 1, 2)
        return x, tuple(int(s) for s in x.shape[1:])
    raise ValueError(f"points in {where} must be a 2-d table, (N, H, W) or (N, C, H, W) images; "
                     f"got shape {x.shape}")


def fill_rows(source: Any, rows: np.ndarray, scale: float) -> Tensor:
    """``source[rows]`` flattened to float32 and multiplied by ``scale``, built block by block.

    ``source`` is any array indexable by row (a memory map, an array view); only the result
    and one block are ever held. Bytes are divided by 255 in float32, so a stored value v
    becomes exactly ``np.float32(v) / np.float32(255)``.
    """
    width = int(np.prod(source.shape[1:]))
    out = np.empty((rows.size, width), dtype=np.float32)
    for start in range(0, rows.size, BLOCK_ROWS):
        block = out[start:start + BLOCK_ROWS]
        wanted = rows[start:start + BLOCK_ROWS]
        order = np.argsort(wanted, kind="stable")  # read a memory map front to back
        block[order] = np.asarray(source[wanted[order]]).reshape(block.shape[0], width)
        if scale == 1.0 / 255.0:
            block /= np.float32(255.0)
        elif scale != 1.0:
            block *= np.float32(scale)
    return torch.from_numpy(out)


def check_unit_range(where: str, *parts: Tensor) -> None:
    """Float images must already lie in [0, 1]: the attack budgets assume that box."""
    filled = [p for p in parts if p.numel()]
    lows, highs = [float(p.min()) for p in filled], [float(p.max()) for p in filled]
    if not all(np.isfinite(v) for v in lows + highs):
        raise ValueError(f"images in {where} must hold finite values; got NaN or inf")
    low, high = min(lows), max(highs)
    if low < 0.0 or high > 1.0:
        raise ValueError(f"float images in {where} must lie in [0, 1] (bytes are scaled by 1/255); "
                         f"got values in [{low:.4g}, {high:.4g}]")
