"""Saving and loading posteriors: safetensors for the tensors, JSON for everything else.

Nothing is ever unpickled or executed on load. Writes go to a temporary file in the same
folder and are renamed into place, so a crash never leaves a half-written posterior.
"""
from __future__ import annotations

import json
import os
import struct
import tempfile
from pathlib import Path
from typing import Any

import torch
from safetensors import SafetensorError
from safetensors.torch import load as load_bytes
from safetensors.torch import save as save_bytes
from torch import nn

__all__ = ["FormatError", "save_ensemble", "load", "read_metadata", "FORMAT_VERSION"]

FORMAT_NAME = "jostle-ensemble"
FORMAT_VERSION = 1
_PREFIX = "param."
_META_KEY = "jostle"


class FormatError(ValueError):
    """A file that is not a readable jostle posterior."""


def save_ensemble(ensemble, path: str | os.PathLike, extra_meta: dict | None = None) -> Path:
    path = Path(path)
    if path.suffix != ".safetensors":
        raise ValueError(f"path must end in .safetensors; got {str(path)!r}")
    meta = dict(ensemble.meta)
    if extra_meta:
        meta.update(extra_meta)
    header = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "members": len(ensemble),
        "meta": _jsonable(meta),
    }
    tensors = {_PREFIX + name: value.detach().to("cpu").contiguous() for name, value in ensemble.params.items()}
    payload = save_bytes(tensors, metadata={_META_KEY: json.dumps(header)})
    _atomic_write(path, payload)
    return path


def read_metadata(path: str | os.PathLike) -> dict:
    """The JSON header of a saved posterior, without reading its tensors."""
    raw = _read_checked(Path(path))
    return _parse_header(raw, Path(path))[0]


def load(path: str | os.PathLike, module: nn.Module | None = None, device: str | torch.device | None = None):
    """Load a posterior saved by :meth:`Ensemble.save`.

    Parameters
    ----------
    path : str or Path
        A ``.safetensors`` file written by jostle.
    module : nn.Module, optional
        The architecture, for posteriors of modules not built by a registered builder
        such as :func:`jostle.mlp`. Its parameter names and shapes must match the file.
    device : str or torch.device, optional
        Where to place the parameters.

    Raises
    ------
    FormatError
        Truncated, corrupted, pickled or foreign files, unknown format versions, and
        architectures that do not match the stored parameters.
    """
    from jostle.posterior.ensemble import Ensemble
    from jostle.posterior.architectures import build_architecture

    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a str or os.PathLike naming a .safetensors file; got {type(path).__name__}")
    path = Path(path)
    if path.is_dir():
        raise IsADirectoryError(f"path must name a .safetensors file; got a directory: {path}")
    raw = _read_checked(path)
    header, _ = _parse_header(raw, path)
    try:
        tensors = load_bytes(raw)
    except (SafetensorError, ValueError, RuntimeError) as err:
        raise FormatError(f"{path} is truncated or corrupted: {err}") from None
    params = {name[len(_PREFIX):]: value for name, value in tensors.items() if name.startswith(_PREFIX)}
    meta = header.get("meta", {})
    if module is None:
        arch = meta.get("architecture")
        if not arch:
            raise FormatError(
                f"{path} holds a custom architecture; pass the module it was made from as module="
            )
        try:
            # Members are fixed networks: a rebuilt Dropout layer must not stay in training mode.
            module = build_architecture(arch["builder"], **arch["kwargs"]).eval()
        except (ValueError, TypeError, KeyError) as err:
            raise FormatError(f"{path} names an architecture jostle cannot rebuild: {err}") from None
    _check_fits(module, params, path)
    ensemble = Ensemble(module, params, meta=meta)
    return ensemble if device is None else ensemble.to(device)


def _check_fits(module: nn.Module, params: dict, path: Path) -> None:
    expected = {**dict(module.named_parameters()), **dict(module.named_buffers())}
    missing = sorted(set(expected) - set(params))
    extra = sorted(set(params) - set(expected))
    if missing or extra:
        raise FormatError(
            f"architecture mismatch: {path} has parameters the module lacks {extra} "
            f"and lacks parameters the module has {missing}"
        )
    for name in expected:
        value = params[name]
        if tuple(value.shape[1:]) != tuple(expected[name].shape):
            raise FormatError(
                f"architecture mismatch: {path} has {name!r} of shape {tuple(value.shape[1:])} per member, "
                f"the module has {tuple(expected[name].shape)}"
            )


def _read_checked(path: Path) -> bytes:
    if not path.exists():
        raise FileNotFoundError(f"path does not exist: {path}")
    raw = path.read_bytes()
    if raw[:1] == b"\x80" and raw[1:2] in (b"\x02", b"\x03", b"\x04", b"\x05"):
        raise FormatError(f"{path} is a Python pickle, not safetensors; jostle never unpickles files")
    if raw[:4] == b"PK\x03\x04":
        raise FormatError(f"{path} is a zip archive (torch.save output), not safetensors; jostle never unpickles files")
    if len(raw) < 8:
        raise FormatError(f"{path} is truncated or corrupted: {len(raw)} bytes is shorter than a safetensors header")
    return raw


def _parse_header(raw: bytes, path: Path) -> tuple[dict, int]:
    (length,) = struct.unpack("<Q", raw[:8])
    if length > len(raw) - 8:
        raise FormatError(f"{path} is truncated or corrupted: header says {length} bytes, file has {len(raw) - 8}")
    try:
        table = json.loads(raw[8:8 + length].decode("utf-8"))
        header = json.loads(table["__metadata__"][_META_KEY])
    except (UnicodeDecodeError, json.JSONDecodeError, KeyError, TypeError):
        raise FormatError(f"{path} is not a jostle posterior (no readable jostle metadata in its header)") from None
    if header.get("format") != FORMAT_NAME:
        raise FormatError(f"{path} is not a jostle posterior (format {header.get('format')!r})")
    version = header.get("format_version")
    if version != FORMAT_VERSION:
        raise FormatError(
            f"{path} has format_version {version!r}; this jostle reads version {FORMAT_VERSION} "
            f"(upgrade jostle to read newer files)"
        )
    return header, length


def _atomic_write(path: Path, payload: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(payload)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _jsonable(value: Any) -> Any:
    """Tensors and arrays become lists; everything must end up JSON-serialisable."""
    import numpy as np

    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, torch.Tensor):
        return value.detach().cpu().tolist()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise TypeError(f"metadata must be JSON-serialisable; got {type(value).__name__}: {value!r}")
