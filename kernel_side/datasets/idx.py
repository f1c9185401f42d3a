"""Data sets from IDX files, the format the standard 28x28 digit and clothing sets ship in.

IDX (LeCun et al., the MNIST distribution page; CHECKS.md): big-endian; a 4-byte magic
number ``00 00 TT NN`` (TT the type code, 0x08 for unsigned bytes; NN the number of
dimensions), one 32-bit size per dimension, then the data in row-major order. Images are
``0x00000803`` (N, H, W) and labels ``0x00000801`` (N,). Gzipped files (first bytes
``1f 8b``) are read as they are.
"""
from __future__ import annotations

import gzip
import struct
import zlib
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from jostle.datasets.arrays import check_test_fraction, class_names, fill_rows, stratified_split
from jostle.datasets.dataset import Dataset, from_arrays

__all__ = ["from_idx", "read_idx"]

GZIP_MAGIC = b"\x1f\x8b"
IMAGES_MAGIC = 0x00000803
LABELS_MAGIC = 0x00000801


def from_idx(images_path: str | Path, labels_path: str | Path, test_images: str | Path | None = None,
             test_labels: str | Path | None = None, *, classes: Sequence[str] | None = None,
             test_fraction: float = 0.2, seed: int = 0) -> Dataset:
    """Read a :class:`Dataset` from IDX image and label files, gzipped or not.

    Parameters
    ----------
    images_path, labels_path : str or Path
        The training images (magic ``0x00000803``, unsigned bytes, N x H x W) and labels
        (magic ``0x00000801``, N unsigned bytes).
    test_images, test_labels : str or Path, optional
        The test files, given together. Without them a seeded share ``test_fraction``
        of each class of the training files is held out (keyword-only ``seed``).
    classes : sequence of str, optional, keyword-only
        Class names by label; default ``"0" ... "K-1"``.

    Returns
    -------
    Dataset
        Pixels scaled by 1/255 to [0, 1], ``image_shape = (1, H, W)``, bounds ``(0, 1)``.
        An uncompressed file is memory-mapped and converted once; a gzipped one is
        decompressed into one preallocated byte array.

    Raises
    ------
    ValueError
        Naming the file: a wrong magic number, a file shorter or longer than its header
        says, a broken gzip stream, label and image counts that differ, or test images of
        another size than the training images.

    Examples
    --------
    >>> data = jostle.datasets.from_idx("train-images-idx3-ubyte.gz", "train-labels-idx1-ubyte.gz",
    ...                                 "t10k-images-idx3-ubyte.gz", "t10k-labels-idx1-ubyte.gz")  # doctest: +SKIP
    """
    if (test_images is None) != (test_labels is None):
        raise ValueError(f"test_images and test_labels must be given together; got test_images={test_images!r}, "
                         f"test_labels={test_labels!r}")
    images, labels = _pair(Path(images_path), Path(labels_path))
    if test_images is None:
        test_fraction = check_test_fraction(test_fraction)
        train_rows, test_rows = stratified_split(labels, test_fraction, seed, str(images_path))
        parts = [(images, train_rows), (images, test_rows)]
        y_train, y_test = labels[train_rows], labels[test_rows]
    else:
        more_images, y_test = _pair(Path(test_images), Path(test_labels))
        if more_images.shape[1:] != images.shape[1:]:
            raise ValueError(f"{test_images} holds {_size(more_images)} images but {images_path} holds "
                             f"{_size(images)} images; test and training images must have one size")
        parts = [(images, np.arange(images.shape[0])), (more_images, np.arange(more_images.shape[0]))]
        y_train = labels
    x_train, x_test = (fill_rows(source, rows, 1.0 / 255.0) for source, rows in parts)
    names = class_names(classes, None, [y_train, y_test], str(labels_path))
    shape = (1, int(images.shape[1]), int(images.shape[2]))
    return from_arrays(x_train, y_train, x_test, y_test, classes=names, name=_stem(Path(images_path)),
                       bounds=(0.0, 1.0), image_shape=shape)


def read_idx(path: str | Path, magic: int) -> np.ndarray:
    """The array in one IDX file whose magic number must be ``magic``, as unsigned bytes.

    An uncompressed file comes back as a read-only memory map; a gzipped one as an array
    filled by streaming decompression.
    """
    path = Path(path)
    try:
        with path.open("rb") as raw:
            zipped = raw.read(2) == GZIP_MAGIC
    except FileNotFoundError:
        raise FileNotFoundError(f"no such IDX file: {path}") from None
    try:
        if zipped:
            with gzip.open(path, "rb") as stream:
                return _read_stream(stream, path, magic)
        return _read_mapped(path, magic)
    except (EOFError, zlib.error, gzip.BadGzipFile) as err:
        raise ValueError(f"{path} is a truncated or damaged gzip file ({err})") from None


def _pair(images_path: Path, labels_path: Path) -> tuple[np.ndarray, np.ndarray]:
    images = read_idx(images_path, IMAGES_MAGIC)
    labels = read_idx(labels_path, LABELS_MAGIC)
    if labels.shape[0] != images.shape[0]:
        raise ValueError(f"{labels_path} holds {labels.shape[0]} labels but {images_path} holds "
                         f"{images.shape[0]} images; they must match")
    if images.shape[0] == 0:
        raise ValueError(f"{images_path} holds no images")
    return images, np.asarray(labels, dtype=np.int64)


def _header(head: bytes, path: Path, magic: int) -> tuple[int, ...]:
    """The sizes after a checked magic number; ``head`` starts at byte 0 of the file."""
    if len(head) < 4:
        raise ValueError(f"{path} is truncated: {len(head)} bytes, shorter than an IDX magic number")
    found = struct.unpack(">I", head[:4])[0]
    if found != magic:
        kind = "image" if magic == IMAGES_MAGIC else "label"
        raise ValueError(f"{path} is not an IDX {kind} file: magic number 0x{found:08x}, expected "
                         f"0x{magic:08x} (unsigned bytes, {magic & 0xFF} dimension{'s' * (magic & 0xFF > 1)})")
    ndim = magic & 0xFF
    if len(head) < 4 + 4 * ndim:
        raise ValueError(f"{path} is truncated inside its header ({len(head)} of {4 + 4 * ndim} bytes)")
    return struct.unpack(f">{ndim}I", head[4:4 + 4 * ndim])


def _read_mapped(path: Path, magic: int) -> np.ndarray:
    header_bytes = 4 + 4 * (magic & 0xFF)
    with path.open("rb") as raw:
        dims = _header(raw.read(header_bytes), path, magic)
    expected = int(np.prod(dims))
    found = path.stat().st_size - header_bytes
    _check_length(path, dims, expected, found)
    if expected == 0:
        return np.zeros(dims, dtype=np.uint8)
    return np.memmap(path, dtype=np.uint8, mode="r", offset=header_bytes, shape=dims)


def _read_stream(stream, path: Path, magic: int) -> np.ndarray:
    header_bytes = 4 + 4 * (magic & 0xFF)
    dims = _header(stream.read(header_bytes), path, magic)
    out = np.empty(dims, dtype=np.uint8)
    view = memoryview(out.reshape(-1))
    filled = 0
    while filled < out.size:
        got = stream.readinto(view[filled:])
        if not got:
            break
        filled += got
    extra = len(stream.read(1)) if filled == out.size else 0
    _check_length(path, dims, out.size, filled + extra)
    return out


def _check_length(path: Path, dims: tuple[int, ...], expected: int, found: int) -> None:
    sizes = " x ".join(str(d) for d in dims)
    if found < expected:
        raise ValueError(f"{path} is truncated: its header promises {sizes} = {expected} bytes of data, "
                         f"found {found}")
    if found > expected:
        raise ValueError(f"{path} is longer than its header says: it promises {sizes} = {expected} bytes "
                         f"of data and more follow")


def _size(images: np.ndarray) -> str:
    return f"{images.shape[1]}x{images.shape[2]}"


def _stem(path: Path) -> str:
    name = path.name
    return name[:-3] if name.endswith(".gz") else name
