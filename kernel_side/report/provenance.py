"""Where a posterior came from, and a hash that says whether two posteriors are the same."""
from __future__ import annotations

import hashlib
import importlib.metadata
import math
from typing import Any

import torch

from jostle.files.posterior_file import jsonable
from jostle.posterior.description import describe
from jostle.posterior.ensemble import Ensemble

__all__ = ["posterior_sha256", "provenance", "software_versions", "CAUTIONS"]

CAUTIONS = (
    "Attack results are empirical evidence, not certificates: an attack that fails to flip a prediction "
    "does not prove that no perturbation within the budget can.",
    "A certified radius, where shown, holds for the stated norm, network and input only.",
    "Before relying on these results, defer to the standards and regulation of your domain "
    "(for example medical-device, automotive or financial guidance) and to its experts.",
)


def posterior_sha256(ens: Ensemble) -> str:
    """SHA-256 of an ensemble's parameters in a canonical byte order.

    Names sorted; for each: the UTF-8 name, its dtype and shape, then the values as raw
    little-endian bytes in C order. The same members give the same hash whether in memory,
    on another device or loaded from a file (``save`` then ``load`` keeps the bytes exactly).
    """
    if not isinstance(ens, Ensemble):
        raise ValueError(f"ens must be a jostle.Ensemble; got {type(ens).__name__}")
    digest = hashlib.sha256()
    for name in sorted(ens.params):
        value = ens.params[name].detach().to("cpu").contiguous()
        digest.update(f"{name}\0{str(value.dtype)}\0{tuple(value.shape)}\0".encode())
        raw = value.flatten().view(torch.uint8).numpy()
        digest.update(raw.tobytes() if _little_endian() else _swapped(value))
    return digest.hexdigest()


def _little_endian() -> bool:
    import sys

    return sys.byteorder == "little"


def _swapped(value: torch.Tensor) -> bytes:  # pragma: no cover - big-endian hosts only
    return value.numpy().astype(value.numpy().dtype.newbyteorder("<")).tobytes()


def software_versions() -> dict[str, str]:
    """The jostle and torch versions that made a report."""
    try:
        version = importlib.metadata.version("jostle")
    except importlib.metadata.PackageNotFoundError:  # pragma: no cover - a source tree without install
        version = "unknown"
    return {"jostle": version, "torch": torch.__version__}


def provenance(ens: Ensemble) -> dict[str, Any]:
    """The posterior's method, size, hyper-parameters, diagnostics, hash and the software versions."""
    meta = ens.meta
    return finite_json({
        "method": str(meta.get("method", "unspecified")),
        "members": len(ens),
        "parameters_per_member": int(ens.num_parameters),
        "architecture": meta.get("architecture"),
        "hyperparameters": meta.get("hyperparameters"),
        "diagnostics": meta.get("diagnostics"),
        "seed": meta.get("seed"),
        "data": meta.get("data"),
        "drawn_from": (type(ens.posterior).__name__ if ens.posterior is not None
                       else "stored draws (no distribution object attached)"),
        "description": describe(ens),
        "posterior_sha256": posterior_sha256(ens),
        "hash_of": "parameters (sorted names; dtype, shape, little-endian C-order bytes)",
        **{f"{k}_version": v for k, v in software_versions().items()},
    })


def finite_json(value: Any) -> Any:
    """JSON-ready copy with NaN and infinities as None (strict JSON has neither)."""
    try:
        value = jsonable(value)
    except TypeError:
        value = str(value)
    if isinstance(value, dict):
        return {str(k): finite_json(v) for k, v in value.items()}
    if isinstance(value, list):
        return [finite_json(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value
