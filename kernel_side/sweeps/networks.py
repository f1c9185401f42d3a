"""The network of a sweep run, built for its data set from the run's ``architecture`` entry.

An entry is one of

- ``{"depth", "width", "activation"}``: :func:`jostle.mlp` with ``depth`` hidden layers of
  ``width`` units (the form every sweep had first; its run keys are kept);
- ``{"builder": <name>, **arguments}``: a registered builder that has a checked front function
  (:func:`jostle.posterior.architectures.architecture_maker`: ``mlp``, ``cnn``), with the
  arguments it was given and its defaults for the rest;
- ``{"callable": "package.module:function", **arguments}``: your own function returning a
  ``torch.nn.Module`` (a bare ``"package.module:function"`` string in the sweep is the same
  with no arguments). It is imported by name, so on a cluster the workers must be able to import
  it too. The run key records the name and the arguments, not the function's code: give changed
  code a new name or argument if its old runs should not count.

Either of the last two is called with the table's other keys as keyword arguments plus, by
keyword and only where its signature names them, what comes from the data set:
``in_features`` (``data.n_features``), ``in_shape`` (``data.image_shape`` as a list
``[C, H, W]``; image data sets only) and ``classes`` (``data.n_classes``). The module's
parameters are drawn again from the run's seed by the fit, so its own initialisation does not matter.
"""
from __future__ import annotations

import importlib
import inspect
from collections.abc import Callable
from typing import Any

from torch import nn

from jostle.posterior.architectures import architecture_maker, mlp

__all__ = ["DATA_ARGUMENTS", "resolve_callable", "factory_of", "build_network", "architecture_label"]

#: arguments the sweep fills from the data set; a sweep may not set them
DATA_ARGUMENTS = ("in_features", "in_shape", "classes")


def resolve_callable(target: Any) -> Callable:
    """Import ``"package.module:function"`` (dots after the colon reach attributes) and return it.

    Raises
    ------
    ValueError
        A malformed name, a module that cannot be imported, a missing attribute, or an object
        that is not callable.
    """
    if not isinstance(target, str) or target.count(":") != 1 or not all(target.split(":")):
        raise ValueError(f"must be 'package.module:function'; got {target!r}")
    module_name, attribute = target.split(":")
    try:
        found: Any = importlib.import_module(module_name)
    except ImportError as err:
        raise ValueError(f"cannot import module {module_name!r} of {target!r} ({err})") from None
    for part in attribute.split("."):
        if not hasattr(found, part):
            raise ValueError(f"module {module_name!r} has no attribute {attribute!r} (from {target!r})")
        found = getattr(found, part)
    if not callable(found):
        raise ValueError(f"{target!r} is not callable; it is a {type(found).__name__}")
    return found


def factory_of(spec: dict) -> Callable:
    """The function that builds an architecture entry (``builder`` or ``callable``)."""
    if "builder" in spec:
        return architecture_maker(spec["builder"])
    return resolve_callable(spec["callable"])


def build_network(spec: dict, data) -> nn.Module:
    """The run's network for ``data`` (a :class:`jostle.Dataset`), from an architecture entry.

    Raises
    ------
    ValueError
        An entry that needs images (``in_shape``) on a data set of feature vectors, a function
        that refuses the arguments, or one that returns something other than an ``nn.Module``.
    """
    if "builder" not in spec and "callable" not in spec:
        return mlp(data.n_features, data.n_classes, hidden=(spec["width"],) * spec["depth"],
                   activation=spec["activation"])
    factory = factory_of(spec)
    named = inspect.signature(factory).parameters
    given = {k: v for k, v in spec.items() if k not in ("builder", "callable")}
    if "in_shape" in named:
        if data.image_shape is None:
            raise ValueError(f"{architecture_label(spec)} needs images (in_shape) but data set {data.name!r} holds "
                             f"feature vectors of {data.n_features} features")
        given["in_shape"] = list(data.image_shape)
    if "in_features" in named:
        given["in_features"] = data.n_features
    if "classes" in named:
        given["classes"] = data.n_classes
    try:
        module = factory(**given)
    except (TypeError, ValueError) as err:
        raise ValueError(f"{architecture_label(spec)} refused its arguments: {err}") from None
    if not isinstance(module, nn.Module):
        raise ValueError(f"{architecture_label(spec)} must return a torch.nn.Module; it returned a "
                         f"{type(module).__name__}")
    return module


def architecture_label(spec: dict) -> str:
    """A short name: ``mlp`` for the depth-width form, else the builder's or the callable's name."""
    return spec.get("builder") or spec.get("callable") or "mlp"
