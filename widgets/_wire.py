"""Arrays on the wire: ``{"shape", "dtype", "buffer"}`` with a binary buffer, never JSON lists."""
from __future__ import annotations

from typing import Any

import numpy as np

_WIRE_DTYPES = ("float32", "float64", "int32", "uint8")


def to_wire(array: Any, dtype: str = "float32") -> dict:
    """Pack ``array`` for a synced trait; the buffer travels as a binary comm buffer."""
    if dtype not in _WIRE_DTYPES:
        raise ValueError(f"dtype must be one of {', '.join(_WIRE_DTYPES)}; got {dtype!r}")
    packed = np.ascontiguousarray(np.asarray(array), dtype=dtype)
    return {"shape": list(packed.shape), "dtype": dtype, "buffer": memoryview(packed.tobytes())}


def from_wire(value: dict) -> np.ndarray:
    """Unpack what :func:`to_wire` made (used by tests and by values coming back)."""
    return np.frombuffer(bytes(value["buffer"]), dtype=value["dtype"]).reshape(value["shape"])


def empty_wire(columns: int | None = None, dtype: str = "float32") -> dict:
    shape = (0,) if columns is None else (0, columns)
    return to_wire(np.zeros(shape), dtype)
