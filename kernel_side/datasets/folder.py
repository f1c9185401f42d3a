"""Data sets from a folder of image files with one sub-folder per class (read with Pillow)."""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import torch

from jostle.common.checks import check_int, show_value
from jostle.datasets.arrays import check_test_fraction, stratified_split
from jostle.datasets.dataset import Dataset, from_arrays

__all__ = ["from_folder"]

#: Pillow modes read as greyscale (the alpha of LA is dropped)
GREY_MODES = ("1", "L", "LA")
#: modes read as colour (palettes expanded, alpha dropped, CMYK and YCbCr converted)
COLOUR_MODES = ("P", "PA", "RGB", "RGBA", "RGBX", "CMYK", "YCbCr")


def from_folder(path: str | Path, size: tuple[int, int] | None = None, test_fraction: float = 0.2,
                seed: int = 0) -> Dataset:
    """Read a :class:`Dataset` from ``path/<class name>/<image file>``.

    Parameters
    ----------
    path : str or Path
        A folder with one sub-folder per class; class names are the sorted sub-folder
        names. Files and folders whose names start with ``.`` are skipped, and so are plain
        files directly inside ``path`` (a README, a licence).
    size : (H, W), optional
        Resize every image to this size (bilinear). Without it all images must share one size.
    test_fraction : float in (0, 1)
        Share of each class held out as the test set, drawn with ``seed``.
    seed : int

    Returns
    -------
    Dataset
        Pixels scaled by 1/255 to [0, 1], ``image_shape = (1, H, W)`` when every image is
        greyscale (modes 1, L, LA) and ``(3, H, W)`` otherwise (greyscale images are then
        repeated over the three channels), bounds ``(0, 1)``.

    Raises
    ------
    ValueError
        Naming the file: a file in a class folder that is not an image Pillow can read,
        an image in a 16-bit or float mode, a damaged image, a nested folder, or (without
        ``size``) an image of another size than the first one.
    """
    root = Path(path)
    if not root.is_dir():
        raise ValueError(f"path must be a folder with one sub-folder per class; got {str(root)!r}, "
                         f"{'a file' if root.exists() else 'which does not exist'}")
    size = _check_size(size)
    test_fraction = check_test_fraction(test_fraction)
    classes, files, labels = _listing(root)
    shape, channels = _survey(files, size)
    train_rows, test_rows = stratified_split(labels, test_fraction, seed, str(root))
    x_train, x_test = (_pixels(files, rows, shape, channels) for rows in (train_rows, test_rows))
    return from_arrays(x_train, labels[train_rows], x_test, labels[test_rows], classes=classes, name=root.name,
                       bounds=(0.0, 1.0), image_shape=(channels, *shape))


def _check_size(size: Any) -> tuple[int, int] | None:
    if size is None:
        return None
    if isinstance(size, (str, bytes)) or not hasattr(size, "__len__") or len(size) != 2:
        raise ValueError(f"size must be None or a pair (H, W) of integers >= 1; got {show_value(size)}")
    return check_int("size[0]", size[0], low=1), check_int("size[1]", size[1], low=1)


def _listing(root: Path) -> tuple[list[str], list[Path], np.ndarray]:
    folders = sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith("."))
    if len(folders) < 2:
        raise ValueError(f"{root} must hold at least 2 class sub-folders; found {len(folders)}")
    files, labels = [], []
    for label, folder in enumerate(folders):
        entries = sorted(p for p in folder.iterdir() if not p.name.startswith("."))
        nested = [p for p in entries if p.is_dir()]
        if nested:
            raise ValueError(f"{nested[0]} is a folder inside the class folder {folder}; "
                             f"from_folder reads one level of class folders")
        if not entries:
            raise ValueError(f"the class folder {folder} holds no image files")
        files += entries
        labels += [label] * len(entries)
    return [f.name for f in folders], files, np.array(labels, dtype=np.int64)


def _survey(files: list[Path], size: tuple[int, int] | None) -> tuple[tuple[int, int], int]:
    """The common (H, W) and channel count, from each file's header (no pixels decoded)."""
    from PIL import Image, UnidentifiedImageError

    first: tuple[Path, tuple[int, int]] | None = None
    colour = False
    for file in files:
        try:
            with Image.open(file) as image:
                height_width, mode = (image.height, image.width), image.mode
        except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as err:
            raise ValueError(f"{file} is not an image file Pillow can read ({err})") from None
        if mode not in GREY_MODES + COLOUR_MODES:
            raise ValueError(f"{file} has Pillow mode {mode!r}; only 8-bit greyscale and colour images are read "
                             f"(one of {list(GREY_MODES + COLOUR_MODES)})")
        colour = colour or mode in COLOUR_MODES
        if first is None:
            first = (file, height_width)
        elif size is None and height_width != first[1]:
            raise ValueError(f"mixed image sizes: {file} is {_hw(height_width)} (H x W) but {first[0]} is "
                             f"{_hw(first[1])}; pass size=(H, W) to resize them all")
    return (size or first[1]), (3 if colour else 1)


def _pixels(files: list[Path], rows: np.ndarray, shape: tuple[int, int], channels: int) -> torch.Tensor:
    """The chosen files decoded straight into one float32 array of rows in [0, 1]."""
    from PIL import Image

    out = np.empty((rows.size, channels * shape[0] * shape[1]), dtype=np.float32)
    for slot, row in enumerate(rows):
        file = files[row]
        try:
            with Image.open(file) as image:
                image = image.convert("L" if channels == 1 else "RGB")
                if (image.height, image.width) != shape:
                    image = image.resize((shape[1], shape[0]), Image.Resampling.BILINEAR)
                pixels = np.asarray(image, dtype=np.uint8)
        except (OSError, SyntaxError, ValueError) as err:
            raise ValueError(f"{file} is a damaged image file ({err})") from None
        target = out[slot].reshape(channels, *shape)
        target[...] = pixels if channels == 1 else pixels.transpose(2, 0, 1)
    out /= np.float32(255.0)
    return torch.from_numpy(out)


def _hw(height_width: tuple[int, int]) -> str:
    return f"{height_width[0]}x{height_width[1]}"
