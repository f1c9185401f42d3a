"""Where a sweep's data come from: built-in sets by name, files read by jostle's loaders, or your own torch datasets.

A run's ``data`` entry is one of

- ``{"name": <built-in>, "n_train": N, **loader args}``: ``moons``, ``circles``, ``spirals`` and
  ``leak_alarm`` draw N training points; ``digits`` and ``meter_cards`` (the digits redrawn at
  scanner resolution, grey or ``colour``) are made whole and keep their first N training points;
- ``{"format": "npz" | "idx" | "folder", <path arguments>, "sha256": {...}, "n_train": N, **loader
  args}``: a file (or folder) read by :func:`jostle.datasets.from_npz`, :func:`~jostle.datasets.from_idx`
  or :func:`~jostle.datasets.from_folder`, keeping its first N training points. The path arguments
  are the loader's own (``path``; ``images_path``, ``labels_path``, ``test_images``,
  ``test_labels``), held as absolute paths; ``sha256`` maps each one to the sha256 of its content
  (of a folder: of its class folders' file names and contents), so a changed file is another data set;
- ``{"format": "torch", "datasets": "package.module:function", "arguments": {...}, "classes": ...,
  "sha256": {"arrays": ...}, "n_train": N}``: ``function(**arguments)`` returns a pair of map-style
  ``torch.utils.data.Dataset`` (train, test), copied by :func:`jostle.datasets.from_torch`; the
  sha256 is that of the copied arrays (:func:`arrays_sha256`), so other data are another data set.

The *source* of a data entry is what is loaded before the training points are cut: the entry
without ``n_train`` where the loader is made whole (``digits``, ``meter_cards``, files), the entry
itself where the loader draws N points. A sweep loads each source once per process and, on a
cluster, sends it to the workers once (:func:`source_of`, :func:`load_source`, :func:`cut`).
"""
from __future__ import annotations

import hashlib
import inspect
import json
from collections import OrderedDict
from pathlib import Path

import numpy as np

from jostle import datasets as _datasets
from jostle.datasets.dataset import Dataset, from_arrays
from jostle.sweeps.networks import resolve_callable

__all__ = ["BUILTIN_DATASETS", "FILE_FORMATS", "PATH_ARGUMENTS", "TORCH_FORMAT", "builtin_loader", "file_loader",
           "content_sha256", "arrays_sha256", "source_of", "load_source", "cut", "data_label", "without_paths"]

#: built-in data sets a sweep may name
BUILTIN_DATASETS = ("moons", "circles", "spirals", "digits", "leak_alarm", "meter_cards")
#: file format -> the jostle loader that reads it
FILE_FORMATS = {"npz": _datasets.from_npz, "idx": _datasets.from_idx, "folder": _datasets.from_folder}
#: file format -> the loader's arguments that name files (first: required ones, then optional ones)
PATH_ARGUMENTS = {"npz": ("path",), "idx": ("images_path", "labels_path", "test_images", "test_labels"),
                  "folder": ("path",)}
#: the format of data made by your own function returning torch datasets (not a file)
TORCH_FORMAT = "torch"
# Sources kept loaded in this process (a small number: a sweep seldom holds more data sets).
_LOADED: OrderedDict[str, tuple[Dataset, str | None]] = OrderedDict()
_KEEP_LOADED = 4
_CHUNK = 1 << 20


def builtin_loader(name: str):
    """The function making built-in data set ``name`` (a member of :data:`BUILTIN_DATASETS`)."""
    return getattr(_datasets, name)


def file_loader(fmt: str):
    """The loader reading file format ``fmt`` (a key of :data:`FILE_FORMATS`)."""
    return FILE_FORMATS[fmt]


def content_sha256(path: str | Path) -> str:
    """sha256 (hex) of a file's bytes; of a folder, of its class folders' files as
    :func:`jostle.datasets.from_folder` reads them (names starting with ``.`` and plain files at the
    top skipped): each file's path inside the folder and the sha256 of its bytes, in sorted order."""
    path = Path(path)
    if not path.is_dir():
        return _file_sha256(path)
    digest = hashlib.sha256()
    for folder in sorted(p for p in path.iterdir() if p.is_dir() and not p.name.startswith(".")):
        for file in sorted(p for p in folder.rglob("*") if p.is_file() and not p.name.startswith(".")):
            digest.update(f"{file.relative_to(path).as_posix()}\0{_file_sha256(file)}\n".encode())
    return digest.hexdigest()


def source_of(spec: dict) -> dict:
    """The part of a run's data entry that decides the loaded data set, before the cut to ``n_train``."""
    if not _draws_points(spec):
        return {k: v for k, v in spec.items() if k != "n_train"}
    return dict(spec)


def _draws_points(spec: dict) -> bool:
    """Whether the entry's loader draws its ``n_train`` points itself (the toy sets), rather than
    being made whole and cut (``digits``, ``meter_cards``, files, torch data)."""
    return "format" not in spec and "n_train" in inspect.signature(builtin_loader(spec["name"])).parameters


def arrays_sha256(data: Dataset) -> str:
    """sha256 (hex) of a data set's arrays: shapes, then the bytes of ``x_train``, ``y_train``,
    ``x_test`` and ``y_test`` (float32 and int64, little-endian as NumPy holds them here), then the
    class names."""
    digest = hashlib.sha256()
    for tensor in (data.x_train, data.y_train, data.x_test, data.y_test):
        array = np.ascontiguousarray(tensor.detach().cpu().numpy())
        digest.update(f"{array.dtype.str}{array.shape}".encode())
        digest.update(array.tobytes())
    digest.update(json.dumps(list(data.classes)).encode())
    return digest.hexdigest()


def load_source(source: dict) -> Dataset:
    """The data set of a source (see :func:`source_of`), loaded once per process.

    A file is hashed again first, and the arrays of a ``torch`` source are hashed once they are
    made; one whose content no longer matches the recorded sha256 is refused (``ValueError``
    naming the file or function), since the run would then fit other data than its key says.
    """
    fmt = source.get("format")
    if fmt in FILE_FORMATS:
        for argument, digest in source["sha256"].items():
            now = content_sha256(source[argument])
            if now != digest:
                raise ValueError(f"{source[argument]} ({argument}) has changed since the sweep was defined: "
                                 f"its sha256 is {now}, the run was defined for {digest}")
    # a torch source is known by its function and arguments until it is made (its hash comes after)
    token = json.dumps({k: v for k, v in source.items() if fmt != TORCH_FORMAT or k != "sha256"}, sort_keys=True)
    if token not in _LOADED:
        _LOADED[token] = _load(source)
        while len(_LOADED) > _KEEP_LOADED:
            _LOADED.popitem(last=False)
    _LOADED.move_to_end(token)
    loaded, digest = _LOADED[token]
    recorded = source.get("sha256", {}).get("arrays") if fmt == TORCH_FORMAT else None
    if recorded is not None and digest != recorded:
        raise ValueError(f"the data sets returned by {source['datasets']!r} have changed since the sweep was "
                         f"defined: their arrays' sha256 is {digest}, the run was defined for {recorded}")
    return loaded


def _load(source: dict) -> tuple[Dataset, str | None]:
    fmt = source.get("format")
    if fmt == TORCH_FORMAT:
        made = resolve_callable(source["datasets"])(**source["arguments"])
        if not isinstance(made, (tuple, list)) or len(made) != 2:
            raise ValueError(f"{source['datasets']!r} must return a pair (train_dataset, test_dataset); got "
                             f"{type(made).__name__}" + (f" of {len(made)}" if isinstance(made, (tuple, list)) else ""))
        loaded = _datasets.from_torch(made[0], made[1], classes=source["classes"])
        return loaded, arrays_sha256(loaded)
    args = {k: v for k, v in source.items() if k not in ("name", "format", "sha256")}
    if fmt is not None:
        if isinstance(args.get("size"), list):
            args["size"] = tuple(args["size"])  # from_folder's (H, W), written as a list in JSON and TOML
        return file_loader(fmt)(**args), None
    return builtin_loader(source["name"])(**args), None


def cut(data: Dataset, spec: dict) -> Dataset:
    """The run's data set: ``data`` (the loaded source) with its first ``spec["n_train"]`` training
    points, or ``data`` itself where the loader drew them. Rows are views, not copies."""
    if _draws_points(spec):
        return data
    n_train = spec["n_train"]
    if n_train > data.x_train.shape[0]:
        raise ValueError(f"n_train must be <= {data.x_train.shape[0]} (the training points of "
                         f"{data_label(spec)}); got {n_train}")
    if n_train == data.x_train.shape[0]:
        return data
    return from_arrays(data.x_train[:n_train], data.y_train[:n_train], data.x_test, data.y_test,
                       classes=data.classes, name=data.name, bounds=data.bounds, image_shape=data.image_shape,
                       feature_names=data.feature_names)


def data_label(spec: dict) -> str:
    """A short name for a data entry: the built-in name, the (first) file's name, or the function's."""
    if "format" not in spec:
        return spec["name"]
    if spec["format"] == TORCH_FORMAT:
        return spec["datasets"]
    return Path(spec[PATH_ARGUMENTS[spec["format"]][0]]).name


def without_paths(spec: dict) -> dict:
    """A data entry as it enters the run key: a file's paths left out, its content hashes kept,
    so a moved file or a sweep started in another folder keeps its runs."""
    if "format" not in spec:
        return spec
    return {k: v for k, v in spec.items() if k not in PATH_ARGUMENTS.get(spec["format"], ())}


def _file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as stream:
        for chunk in iter(lambda: stream.read(_CHUNK), b""):
            digest.update(chunk)
    return digest.hexdigest()
