"""Data sets from NumPy ``.npz`` files of named arrays."""
from __future__ import annotations

import zipfile
import zlib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from jostle.common.checks import show_value
from jostle.datasets.arrays import (
    as_image_array,
    check_test_fraction,
    check_unit_range,
    class_names,
    fill_rows,
    label_codes,
    pixel_scale,
    stratified_split,
)
from jostle.datasets.dataset import Dataset, from_arrays

__all__ = ["from_npz"]


def from_npz(path: str | Path, x_key: str = "x", y_key: str = "y", test_fraction: float = 0.2,
             classes: Sequence[str] | None = None, seed: int = 0) -> Dataset:
    """Read a :class:`Dataset` from a ``.npz`` file (``numpy.savez``) of named arrays.

    Parameters
    ----------
    path : str or Path
    x_key, y_key : str
        Names of the points and labels arrays. Points of shape ``(N, D)`` are feature
        vectors; ``(N, H, W)`` greyscale images; ``(N, C, H, W)`` (or channels last
        ``(N, H, W, C)`` with C in 1, 3, 4) images. Labels are integers ``0..K-1`` or strings
        (classes are then the sorted names).
    test_fraction : float in (0, 1)
        Share of each class held out as the test set, drawn with ``seed``. If the file also
        holds ``x_key + "_test"`` and ``y_key + "_test"``, those are the test set instead.
    classes : sequence of str, optional
        Class names by label; default ``"0" ... "K-1"`` (or the label strings).
    seed : int

    Returns
    -------
    Dataset
        Images are scaled to [0, 1] (bytes by 1/255; float images must already lie there),
        flattened in ``(C, H, W)`` order, with ``image_shape = (C, H, W)`` and bounds
        ``(0, 1)``. Feature vectors keep their values; bounds are their range widened by half.

    Raises
    ------
    ValueError
        A file that is not an ``.npz`` archive, a missing key, object (pickled) arrays,
        label and point counts that differ, or pixel values outside the rules; the message
        names the file.
    """
    path = Path(path)
    test_fraction = check_test_fraction(test_fraction)
    for name, key in (("x_key", x_key), ("y_key", y_key)):
        if not isinstance(key, str):
            raise ValueError(f"{name} must be the name of an array (str); got {show_value(key)}")
    with _open(path) as archive:
        x = _member(archive, path, x_key)
        y_raw = _member(archive, path, y_key)
        has_test = f"{x_key}_test" in archive.files and f"{y_key}_test" in archive.files
        x_test = _member(archive, path, f"{x_key}_test") if has_test else None
        y_test_raw = _member(archive, path, f"{y_key}_test") if has_test else None
    y, found = _labels(y_raw, x, path, x_key, y_key)
    if x_test is None:
        train_rows, test_rows = stratified_split(y, test_fraction, seed, str(path))
        parts = [(x, train_rows), (x, test_rows)]
        y_train, y_test = y[train_rows], y[test_rows]
    else:
        y_test, _ = _labels(y_test_raw, x_test, path, f"{x_key}_test", f"{y_key}_test")
        if found is not None:  # string labels: code the test names by the training names
            y_test = _recode(y_test_raw, found, path, f"{y_key}_test")
        parts = [(x, np.arange(x.shape[0])), (x_test, np.arange(x_test.shape[0]))]
        y_train = y
    return _build(path, parts, y_train, y_test, class_names(classes, found, [y_train, y_test], str(path)))


def _build(path: Path, parts, y_train, y_test, classes) -> Dataset:
    views = [as_image_array(x, f"{path}") for x, _ in parts]
    shapes = {shape for _, shape in views}
    widths = {int(np.prod(v.shape[1:])) for v, _ in views}
    if len(shapes) > 1 or len(widths) > 1:
        raise ValueError(f"the test points in {path} must have the training points' shape; "
                         f"got {[tuple(x.shape[1:]) for x, _ in parts]}")
    shape = views[0][1]
    scales = [pixel_scale(v, str(path)) if shape else 1.0 for v, _ in views]
    x_train, x_test = (fill_rows(v, rows, s) for (v, _), (_, rows), s in zip(views, parts, scales))
    if shape is not None:
        check_unit_range(str(path), x_train, x_test)
    return from_arrays(x_train, y_train, x_test, y_test, classes=classes, name=path.stem,
                       bounds=(0.0, 1.0) if shape else None, image_shape=shape)


def _open(path: Path):
    try:
        loaded = np.load(path, allow_pickle=False)
    except FileNotFoundError:
        raise FileNotFoundError(f"no such .npz file: {path}") from None
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as err:
        raise ValueError(f"{path} is not a readable .npz archive of arrays ({err})") from None
    if not hasattr(loaded, "files"):
        raise ValueError(f"{path} is a single .npy array, not an .npz archive of named arrays")
    return loaded


def _member(archive: Any, path: Path, key: str) -> np.ndarray:
    if key not in archive.files:
        raise ValueError(f"{path} has no array named {key!r}; it holds {sorted(archive.files)}")
    try:
        return archive[key]
    except ValueError as err:
        raise ValueError(f"array {key!r} in {path} cannot be read without unpickling ({err}); "
                         f"store plain numeric arrays") from None
    except (OSError, EOFError, zipfile.BadZipFile, zlib.error) as err:
        raise ValueError(f"array {key!r} in {path} is damaged or truncated ({err})") from None


def _labels(y_raw: np.ndarray, x: np.ndarray, path: Path, x_key: str, y_key: str):
    y, found = label_codes(y_raw, f"{path} (array {y_key!r})")
    if y.shape[0] != x.shape[0]:
        raise ValueError(f"{path} holds {y.shape[0]} labels in {y_key!r} but {x.shape[0]} points in {x_key!r}; "
                         f"they must match")
    return y, found


def _recode(y_raw: np.ndarray, names: list[str], path: Path, y_key: str) -> np.ndarray:
    lookup = {n: k for k, n in enumerate(names)}
    unknown = sorted({str(v) for v in y_raw} - set(lookup))
    if unknown:
        raise ValueError(f"labels in {path} (array {y_key!r}) must be training labels {names}; got {unknown}")
    return np.array([lookup[str(v)] for v in y_raw], dtype=np.int64)
