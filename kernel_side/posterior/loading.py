"""Loading a saved posterior back into an :class:`Ensemble`."""
from __future__ import annotations

import os
from pathlib import Path

import torch
from torch import nn

from jostle.files.posterior_file import FormatError, read_posterior
from jostle.posterior.architectures import build_architecture
from jostle.posterior.ensemble import Ensemble

__all__ = ["load"]


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
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a str or os.PathLike naming a .safetensors file; got {type(path).__name__}")
    path = Path(path)
    if path.is_dir():
        raise IsADirectoryError(f"path must name a .safetensors file; got a directory: {path}")
    params, meta = read_posterior(path)
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
