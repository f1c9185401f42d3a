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

__all__ = ["FormatError", "FORMAT_VERSION", "atomic_write", "jsonable", "read_metadata", "read_posterior",
           "write_posterior"]

FORMAT_NAME = "jostle-ensemble"
FORMAT_VERSION = 1
_PREFIX = "param."
_META_KEY = "jostle"


class FormatError(ValueError):
    """A file that is not a readable jostle posterior."""


def write_posterior(path: str | os.PathLike, params: dict[str, torch.Tensor], meta: dict) -> Path:
    """Write stacked member parameters and JSON metadata to ``path`` atomically."""
    path = Path(path)
    if path.suffix != ".safetensors":
        raise ValueError(f"path must end in .safetensors; got {str(path)!r}")
    members = {int(value.shape[0]) for value in params.values()}
    header = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "members": members.pop() if len(members) == 1 else None,
        "meta": jsonable(meta),
    }
    tensors = {_PREFIX + name: value.detach().to("cpu").contiguous() for name, value in params.items()}
    payload = save_bytes(tensors, metadata={_META_KEY: json.dumps(header)})
    atomic_write(path, payload)
    return path


def read_metadata(path: str | os.PathLike) -> dict:
    """The JSON header of a saved posterior, without reading its tensors."""
    raw = _read_checked(Path(path))
    return _parse_header(raw, Path(path))[0]


def read_posterior(path: str | os.PathLike) -> tuple[dict[str, torch.Tensor], dict]:
    """The stacked parameters and the metadata of a saved posterior.

    Raises
    ------
    FormatError
        Truncated, corrupted, pickled or foreign files and unknown format versions.
    """
    path = Path(path)
    raw = _read_checked(path)
    header, _ = _parse_header(raw, path)
    try:
        tensors = load_bytes(raw)
    except (SafetensorError, ValueError, RuntimeError) as err:
        raise FormatError(f"{path} is truncated or corrupted: {err}") from None
    params = {name[len(_PREFIX):]: value for name, value in tensors.items() if name.startswith(_PREFIX)}
    return params, header.get("meta", {})


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


def _file_mode() -> int:
    """The mode a plain ``open(path, "w")`` would give a new file: 0o666 less the umask."""
    umask = os.umask(0o022)
    os.umask(umask)
    return 0o666 & ~umask


_NEW_FILE_MODE = _file_mode()


def atomic_write(path: Path, payload: bytes) -> None:
    """Write ``payload`` to a temporary file beside ``path``, then rename it over ``path``.

    Readers see the old file or the new one, never a part. The file gets the mode an ordinary
    write would give it (an existing file keeps its own), not the temporary file's 0o600.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    mode = path.stat().st_mode & 0o777 if path.exists() else _NEW_FILE_MODE
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(payload)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, mode)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def jsonable(value: Any) -> Any:
    """Tensors and arrays become lists; everything must end up JSON-serialisable."""
    import numpy as np

    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, torch.Tensor):
        return value.detach().cpu().tolist()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise TypeError(f"metadata must be JSON-serialisable; got {type(value).__name__}: {value!r}")
