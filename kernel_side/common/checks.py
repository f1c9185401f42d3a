"""Input checks shared by the public functions.

Every check raises with a message that names the parameter, the rule and the
value received, e.g. ``eps must be a finite float >= 0; got -0.1``.
"""
from __future__ import annotations

import math
from numbers import Integral, Real
from typing import Any

import numpy as np
import torch
from torch import Tensor


def show_value(value: Any) -> str:
    if isinstance(value, Tensor):
        if value.numel() <= 6:
            return repr(value.tolist())
        return f"tensor of shape {tuple(value.shape)}"
    if isinstance(value, np.ndarray):
        if value.size <= 6:
            return repr(value.tolist())
        return f"array of shape {value.shape}"
    text = repr(value)
    return text if len(text) <= 80 else text[:77] + "..."


def check_int(name: str, value: Any, *, low: int | None = None, high: int | None = None) -> int:
    """An integer within [low, high]; bools are refused."""
    rule = "an integer"
    if low is not None and high is not None:
        rule = f"an integer in [{low}, {high}]"
    elif low is not None:
        rule = f"an integer >= {low}"
    elif high is not None:
        rule = f"an integer <= {high}"
    if isinstance(value, bool) or not isinstance(value, Integral):
        raise ValueError(f"{name} must be {rule}; got {show_value(value)}")
    value = int(value)
    if (low is not None and value < low) or (high is not None and value > high):
        raise ValueError(f"{name} must be {rule}; got {value}")
    return value


def check_float(
    name: str,
    value: Any,
    *,
    low: float | None = None,
    high: float | None = None,
    low_open: bool = False,
    high_open: bool = False,
) -> float:
    """A finite real number within the given bounds."""
    parts = []
    if low is not None:
        parts.append(f"{'>' if low_open else '>='} {low:g}")
    if high is not None:
        parts.append(f"{'<' if high_open else '<='} {high:g}")
    rule = "a finite float" + (" " + " and ".join(parts) if parts else "")
    if isinstance(value, bool) or not isinstance(value, Real):
        raise ValueError(f"{name} must be {rule}; got {show_value(value)}")
    value = float(value)
    bad = not math.isfinite(value)
    if low is not None:
        bad = bad or (value <= low if low_open else value < low)
    if high is not None:
        bad = bad or (value >= high if high_open else value > high)
    if bad:
        raise ValueError(f"{name} must be {rule}; got {value:g}")
    return value


def check_choice(name: str, value: Any, choices: tuple[str, ...]) -> str:
    if not isinstance(value, str) or value not in choices:
        listed = ", ".join(repr(c) for c in choices)
        raise ValueError(f"{name} must be one of {listed}; got {show_value(value)}")
    return value


def as_float_tensor(
    name: str,
    value: Any,
    *,
    ndim: int | tuple[int, ...] | None = None,
    dtype: torch.dtype = torch.float32,
    device: torch.device | str | None = None,
) -> Tensor:
    """Convert array-likes to a finite floating tensor, checking its rank."""
    try:
        tensor = torch.as_tensor(value, dtype=dtype, device=device)
    except (TypeError, ValueError, RuntimeError) as err:
        raise ValueError(f"{name} must be a numeric array; got {show_value(value)} ({err})") from None
    if ndim is not None:
        allowed = (ndim,) if isinstance(ndim, int) else ndim
        if tensor.ndim not in allowed:
            ranks = " or ".join(f"{r}-d" for r in allowed)
            raise ValueError(f"{name} must be a {ranks} array; got shape {tuple(tensor.shape)}")
    if not bool(torch.isfinite(tensor).all()):
        raise ValueError(f"{name} must contain only finite values; got NaN or inf")
    return tensor


def check_points(
    name: str,
    x: Any,
    ens_or_features: Any,
    *,
    min_points: int = 0,
    detach: bool = False,
    dtype: torch.dtype | None = None,
    device: torch.device | str | None = None,
) -> Tensor:
    """A batch of inputs as a finite real tensor of shape (n_points, *input_shape).

    Parameters
    ----------
    name : str
        The parameter's name, used in every message (``x``, ``x_adv``, ...).
    x : Tensor or array-like
        The inputs. A tensor keeps its autograd graph unless ``detach``.
    ens_or_features : Ensemble-like or int
        An object with ``dtype``, ``device`` and ``check_input_shape(x, name)`` (an
        :class:`~jostle.posterior.ensemble.Ensemble`): ``x`` is cast to its dtype and device
        and must feed its first layer. An int ``d``: ``x`` must have shape (n_points, d).
    min_points : int
        Fewest points accepted (1 refuses an empty batch).
    detach : bool
        Cut ``x`` from any autograd graph.
    dtype, device : optional
        With an int ``ens_or_features``, the dtype (default float32) and device (default:
        where ``x`` is) to cast to.

    Returns
    -------
    Tensor of shape (n_points, *input_shape)

    Examples
    --------
    >>> check_points("x", [[0.0, 1.0]], 2).shape
    torch.Size([1, 2])
    >>> check_points("x", torch.zeros(3, 5), 2)
    Traceback (most recent call last):
    ...
    ValueError: x must have shape (n_points, 2); got shape (3, 5)
    """
    features = None
    if isinstance(ens_or_features, Integral) and not isinstance(ens_or_features, bool):
        features = int(ens_or_features)
        target_dtype = dtype or torch.float32
    else:
        target_dtype, device = ens_or_features.dtype, ens_or_features.device
    x = _as_tensor(name, x)
    if x.ndim < 2:
        raise ValueError(f"{name} must have shape (n_points, *input_shape); got shape {tuple(x.shape)} "
                         f"(use {name}[None] for a single point)")
    if device is None:
        check_has_values(name, x)
    else:
        check_devices(name, x.device, "ens", device)
    check_real_dtype(name, x)
    if detach:
        x = x.detach()
    if x.dtype != target_dtype or (device is not None and x.device != torch.device(device)):
        x = x.to(device=device, dtype=target_dtype)
    if x.shape[0] < min_points:
        rule = "at least one point" if min_points == 1 else f"at least {min_points} points"
        raise ValueError(f"{name} must hold {rule}; got shape {tuple(x.shape)}")
    if features is None:
        ens_or_features.check_input_shape(x, name)
    elif x.ndim != 2 or x.shape[1] != features:
        raise ValueError(f"{name} must have shape (n_points, {features}); got shape {tuple(x.shape)}")
    return check_finite(name, x)


def as_label_tensor(name: str, value: Any, *, n_points: int, classes: int | None = None) -> Tensor:
    """Integer class labels of shape (n_points,) within [0, classes)."""
    if isinstance(value, Tensor):
        value = check_has_values(name, value).detach().cpu()
    try:
        array = np.asarray(value)
    except ValueError:
        raise ValueError(f"{name} must be a 1-d array of integer class labels; got {show_value(value)}") from None
    if array.dtype == object and array.ndim == 1 and all(isinstance(v, Integral) for v in array):
        low, high = min(array, default=0), max(array, default=0)  # ints past int64: range first
        if low < 0:
            raise ValueError(f"{name} must hold labels >= 0; got {low}")
        if classes is not None and high >= classes:
            raise ValueError(f"{name} must hold labels < {classes} (the number of classes); got {high}")
    if array.dtype.kind not in "biuf":
        raise ValueError(f"{name} must hold integer class labels; got dtype {array.dtype} ({show_value(value)})")
    if array.ndim != 1 or array.shape[0] != n_points:
        raise ValueError(f"{name} must have shape ({n_points},); got shape {array.shape}")
    if array.size and not np.issubdtype(array.dtype, np.integer):
        if not np.all(np.isfinite(array)) or not np.all(array == np.round(array)):
            raise ValueError(f"{name} must hold integer class labels; got dtype {array.dtype}")
    labels = torch.as_tensor(array.astype(np.int64))
    if labels.numel() and int(labels.min()) < 0:
        raise ValueError(f"{name} must hold labels >= 0; got {int(labels.min())}")
    if classes is not None and labels.numel() and int(labels.max()) >= classes:
        raise ValueError(f"{name} must hold labels < {classes} (the number of classes); got {int(labels.max())}")
    return labels


SEED_MAX = 2**63 - 1


def check_seed(value: Any, name: str = "seed") -> int:
    """A seed torch.Generator.manual_seed takes: an integer in [0, 2**63 - 1]."""
    value = check_int(name, value, low=0)
    if value > SEED_MAX:
        raise ValueError(f"{name} must be an integer >= 0 and <= 2**63 - 1; got {value}")
    return value


def check_real_dtype(name: str, tensor: Tensor) -> Tensor:
    """Refuse complex tensors, whose imaginary part a cast to float would drop silently."""
    if tensor.is_complex():
        raise ValueError(f"{name} must hold real numbers; got dtype {tensor.dtype}")
    return tensor


def check_finite(name: str, tensor: Tensor) -> Tensor:
    """Refuse NaN and inf entries (checked after any cast, so overflow to inf is caught)."""
    if not bool(torch.isfinite(tensor).all()):
        raise ValueError(f"{name} must contain only finite values; got NaN or inf")
    return tensor


def check_devices(name: str, device: torch.device, other_name: str, other_device: torch.device) -> None:
    """Refuse a 'meta' tensor on either side: it holds no values, so nothing can be computed or moved."""
    device, other_device = torch.device(device), torch.device(other_device)
    if "meta" in (device.type, other_device.type):
        raise ValueError(
            f"{name} is on device {device.type!r} and {other_name} on device {other_device.type!r}; "
            f"a 'meta' tensor holds no values, so put both on one real device (e.g. .to('cpu'))"
        )


def check_has_values(name: str, tensor: Tensor) -> Tensor:
    """Refuse a tensor on the 'meta' device, which has a shape but no values."""
    if tensor.device.type == "meta":
        raise ValueError(f"{name} is on device 'meta', which holds no values; "
                         f"pass it on a real device (e.g. .to('cpu'))")
    return tensor


def check_representable(name: str, value: float, dtype: torch.dtype) -> float:
    """A finite float that stays finite when stored in ``dtype`` (float32 overflows past ~3.4e38)."""
    largest = torch.finfo(dtype).max
    if abs(value) > largest:
        raise ValueError(f"{name} must fit the ensemble's dtype {str(dtype).replace('torch.', '')} "
                         f"(|{name}| <= {largest:.4g}); got {value:g}")
    return value


def as_numeric_array(name: str, value: Any) -> np.ndarray:
    """A float64 numpy array from tensors (any device with data) and array-likes."""
    if isinstance(value, Tensor):
        check_has_values(name, value)
        value = value.detach().cpu()
        check_real_dtype(name, value)
    try:
        array = np.asarray(value, dtype=float)
    except (TypeError, ValueError) as err:
        raise ValueError(f"{name} must be a numeric array; got {show_value(value)} ({err})") from None
    return array


def _as_tensor(name: str, value: Any) -> Tensor:
    """A tensor from array-likes (lists, numpy arrays, frames), kept as is when one already."""
    if isinstance(value, Tensor):
        return value
    try:
        return torch.as_tensor(np.asarray(value))
    except (TypeError, ValueError, RuntimeError):
        raise ValueError(f"{name} must be a numeric array of shape (n_points, ...); got {show_value(value)}") from None


#: relative slack for points on the edge of the input box (float rounding of a projection)
BOUNDS_SLACK = 1e-6


def resolve_bounds(ens: Any, bounds: Any, x: torch.Tensor, finite: bool = False):
    """The input box as a pair of tensors shaped like one point, from ``bounds`` or ``ens.meta["bounds"]``.

    None when neither is set. Each side is a scalar or one value per feature, ``lo <= hi``
    everywhere (and finite when ``finite``), and every point of ``x`` lies inside (to 1e-6
    relative slack); each failure names the source, the rule and the value.
    """
    source = "bounds"
    if bounds is None:
        bounds = ens.meta.get("bounds")
        source = 'ens.meta["bounds"]'
        if bounds is None:
            return None
    if not isinstance(bounds, (tuple, list)) or len(bounds) != 2:
        raise ValueError(f"{source} must be a pair (lo, hi); got {show_value(bounds)}")
    shape = tuple(x.shape[1:])
    features = int(np.prod(shape))
    pair = []
    for side, value in zip(("lo", "hi"), bounds):
        array = value.detach().cpu() if isinstance(value, torch.Tensor) else value
        try:
            tensor = torch.as_tensor(np.asarray(array, dtype=np.float64), dtype=x.dtype)
        except (TypeError, ValueError):
            raise ValueError(f"{source} {side} must be numeric; got {show_value(value)}") from None
        if finite and not bool(torch.isfinite(tensor).all()):
            raise ValueError(f"{source} {side} must be finite; got {show_value(value)}")
        if tensor.numel() not in (1, features):
            raise ValueError(f"{source} {side} must be a scalar or hold {features} values; got {tensor.numel()}")
        pair.append(tensor.expand(features).reshape(shape).to(x.device))
    lo, hi = pair
    if bool((lo > hi).any()):
        raise ValueError(f"{source} must have lo <= hi in every feature; got lo={show_value(lo)}, hi={show_value(hi)}")
    check_inside(x, lo, hi, source)
    return lo, hi


def check_inside(x: torch.Tensor, lo: torch.Tensor, hi: torch.Tensor, source: str) -> None:
    """Refuse points of ``x`` outside [lo, hi] (1e-6 relative slack), naming the first one."""
    slack = BOUNDS_SLACK * (1.0 + torch.maximum(lo.abs(), hi.abs()))
    below = x < lo - slack
    above = x > hi + slack
    bad = below | above
    if bool(bad.any()):
        flat = bad.flatten(1)
        point = int(flat.any(1).nonzero()[0])
        feature = int(flat[point].nonzero()[0])
        value = float(x.flatten(1)[point, feature])
        side = f"< lo = {float(lo.flatten()[feature]):g}" if below.flatten(1)[point, feature] else \
            f"> hi = {float(hi.flatten()[feature]):g}"
        raise ValueError(f"x must lie inside {source}; point {point}, feature {feature} is {value:g} {side}")
