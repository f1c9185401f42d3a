"""Built-in data sets, seeded and deterministic, with no downloads.

The 2-D toy sets come from scikit-learn's generators (``make_moons``, ``make_circles``)
or a generator written here (``spirals``); ``digits`` is scikit-learn's bundled copy of
the UCI Optical Recognition of Handwritten Digits data (test part: 1,797 8x8 images).
"""
from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from torch import Tensor

from jostle.common.checks import as_float_tensor, as_label_tensor, check_float, check_int

__all__ = ["Dataset", "moons", "circles", "spirals", "digits", "leak_alarm", "from_arrays", "TEST_SEED_OFFSET"]

#: test sets use ``random_state = seed + TEST_SEED_OFFSET``; train sets use ``seed`` itself
TEST_SEED_OFFSET = 10_000


@dataclass(frozen=True)
class Dataset:
    """Train and test arrays with the facts downstream code needs.

    Attributes
    ----------
    x_train, x_test : Tensor of shape (n_points, n_features), float32
    y_train, y_test : Tensor of shape (n_points,), int64
    classes : list of str
        Class names, indexed by label.
    name : str
    bounds : (Tensor, Tensor) of shape (n_features,) each
        The input box attacks must stay inside (``lo <= x <= hi``).
    image_shape : tuple of int or None
        ``(8, 8)`` for digits; None for feature vectors.
    feature_names : list of str
    """

    x_train: Tensor
    y_train: Tensor
    x_test: Tensor
    y_test: Tensor
    classes: list[str]
    name: str
    bounds: tuple[Tensor, Tensor]
    image_shape: tuple[int, ...] | None = None
    feature_names: list[str] = field(default_factory=list)

    @property
    def n_features(self) -> int:
        return int(self.x_train.shape[1])

    @property
    def n_classes(self) -> int:
        return len(self.classes)

    def describe(self) -> dict:
        """A JSON-friendly record (stored in posterior metadata)."""
        return {
            "name": self.name,
            "classes": list(self.classes),
            "bounds": [self.bounds[0].tolist(), self.bounds[1].tolist()],
            "image_shape": list(self.image_shape) if self.image_shape else None,
            "feature_names": list(self.feature_names),
            "n_train": int(self.x_train.shape[0]),
            "n_test": int(self.x_test.shape[0]),
        }

    def __repr__(self) -> str:
        return (
            f"Dataset(name={self.name!r}, n_train={self.x_train.shape[0]}, n_test={self.x_test.shape[0]}, "
            f"n_features={self.n_features}, classes={self.classes!r})"
        )


def from_arrays(
    x_train: Any,
    y_train: Any,
    x_test: Any,
    y_test: Any,
    classes: Sequence[str] | None = None,
    name: str = "custom",
    bounds: tuple[Any, Any] | None = None,
    image_shape: tuple[int, ...] | None = None,
    feature_names: Sequence[str] | None = None,
) -> Dataset:
    """Wrap your own arrays as a :class:`Dataset`, checking shapes, values and labels.

    ``bounds`` defaults to the data's range widened by half its span on each side.
    """
    xtr = as_float_tensor("x_train", x_train, ndim=2)
    xte = as_float_tensor("x_test", x_test, ndim=2)
    if xte.shape[1] != xtr.shape[1]:
        raise ValueError(f"x_test must have {xtr.shape[1]} features like x_train; got {xte.shape[1]}")
    if xtr.shape[0] == 0:
        raise ValueError("x_train must hold at least one point; got 0")
    ytr_raw = as_label_tensor("y_train", y_train, n_points=xtr.shape[0])
    n_classes = len(classes) if classes is not None else int(ytr_raw.max()) + 1
    ytr = as_label_tensor("y_train", ytr_raw, n_points=xtr.shape[0], classes=n_classes)
    yte = as_label_tensor("y_test", y_test, n_points=xte.shape[0], classes=n_classes)
    if classes is None:
        classes = [str(c) for c in range(n_classes)]
    classes = [str(c) for c in classes]
    if n_classes < 2:
        raise ValueError(f"classes must name at least 2 classes; got {classes!r}")
    lo, hi = _bounds(bounds, torch.cat([xtr, xte]))
    if bool((xtr < lo).any() or (xtr > hi).any() or (xte < lo).any() or (xte > hi).any()):
        raise ValueError("bounds must contain every point of x_train and x_test; some lie outside")
    if image_shape is not None:
        image_shape = tuple(int(s) for s in image_shape)
        if int(np.prod(image_shape)) != xtr.shape[1]:
            raise ValueError(f"image_shape {image_shape} must multiply to n_features = {xtr.shape[1]}")
    if feature_names is None:
        feature_names = [f"x{i + 1}" for i in range(xtr.shape[1])]
    feature_names = [str(f) for f in feature_names]
    if len(feature_names) != xtr.shape[1]:
        raise ValueError(f"feature_names must name {xtr.shape[1]} features; got {len(feature_names)}")
    return Dataset(xtr, ytr, xte, yte, classes, str(name), (lo, hi), image_shape, feature_names)


def moons(n_train: int = 300, n_test: int = 300, noise: float = 0.2, seed: int = 0) -> Dataset:
    """Two interleaving half circles (``sklearn.datasets.make_moons``).

    The training set is ``make_moons(n_train, noise=noise, random_state=seed)`` exactly;
    the test set uses ``random_state=seed + TEST_SEED_OFFSET``.
    """
    from sklearn.datasets import make_moons

    n_train, n_test, noise, seed = _toy_args(n_train, n_test, noise, seed)
    xtr, ytr = make_moons(n_train, noise=noise, random_state=seed)
    xte, yte = make_moons(n_test, noise=noise, random_state=seed + TEST_SEED_OFFSET)
    return from_arrays(xtr, ytr, xte, yte, classes=["0", "1"], name="moons", bounds=_toy_box(xtr, xte))


def circles(n_train: int = 300, n_test: int = 300, noise: float = 0.1, factor: float = 0.5, seed: int = 0) -> Dataset:
    """A small circle inside a large one (``sklearn.datasets.make_circles``)."""
    from sklearn.datasets import make_circles

    n_train, n_test, noise, seed = _toy_args(n_train, n_test, noise, seed)
    factor = check_float("factor", factor, low=0.0, high=1.0, low_open=True, high_open=True)
    xtr, ytr = make_circles(n_train, noise=noise, factor=factor, random_state=seed)
    xte, yte = make_circles(n_test, noise=noise, factor=factor, random_state=seed + TEST_SEED_OFFSET)
    return from_arrays(xtr, ytr, xte, yte, classes=["0", "1"], name="circles", bounds=_toy_box(xtr, xte))


def spirals(n_train: int = 300, n_test: int = 300, noise: float = 0.1, turns: float = 1.5, seed: int = 0) -> Dataset:
    """Two interleaved Archimedean spirals, radius growing from 0.2 to 2."""
    n_train, n_test, noise, seed = _toy_args(n_train, n_test, noise, seed)
    turns = check_float("turns", turns, low=0.0, low_open=True)
    xtr, ytr = _spiral_points(n_train, noise, turns, np.random.default_rng(seed))
    xte, yte = _spiral_points(n_test, noise, turns, np.random.default_rng(seed + TEST_SEED_OFFSET))
    return from_arrays(xtr, ytr, xte, yte, classes=["0", "1"], name="spirals", bounds=_toy_box(xtr, xte))


def digits(test_fraction: float = 0.3, seed: int = 0) -> Dataset:
    """scikit-learn's bundled 8x8 handwritten digits, scaled from 0..16 to [0, 1].

    Source: UCI Optical Recognition of Handwritten Digits (test part), 1,797 images,
    10 classes. Split into train and test, stratified by class, with ``seed``.
    """
    from sklearn.datasets import load_digits
    from sklearn.model_selection import train_test_split

    test_fraction = check_float("test_fraction", test_fraction, low=0.0, high=1.0, low_open=True, high_open=True)
    seed = check_int("seed", seed, low=0)
    bunch = load_digits()
    x = bunch.data.astype(np.float32) / 16.0
    xtr, xte, ytr, yte = train_test_split(
        x, bunch.target, test_size=test_fraction, random_state=seed, stratify=bunch.target
    )
    names = [f"pixel {r},{c}" for r in range(8) for c in range(8)]
    return from_arrays(
        xtr, ytr, xte, yte, classes=[str(d) for d in range(10)], name="digits",
        bounds=(0.0, 1.0), image_shape=(8, 8), feature_names=names,
    )


#: the leak-alarm map from make_moons units: feature = sign * (x - centre) / scale
LEAK_ALARM_CENTRE = (0.5, 0.25)
LEAK_ALARM_SCALE = (0.87, 0.5)
LEAK_ALARM_SIGN = (1.0, -1.0)
LEAK_ALARM_FEATURES = ["night-flow excess", "acoustic hiss"]


def leak_alarm(n_train: int = 200, n_test: int = 200, noise: float = 0.2, seed: int = 0) -> Dataset:
    """The demo scenario's leak alarm: two standardised pipe-sensor features, steady or leak.

    Synthetic data: :func:`moons` (``sklearn.datasets.make_moons``) mapped by a fixed
    affine map to "night-flow excess" and "acoustic hiss" in standard-deviation units
    (``LEAK_ALARM_CENTRE``, ``LEAK_ALARM_SCALE``, ``LEAK_ALARM_SIGN``; hiss is flipped so
    leaks hiss more). Moon 0 is "steady", moon 1 is "leak". The map is the same for every
    seed, so a point keeps its meaning across data sets.

    Returns
    -------
    Dataset
        ``name="leak_alarm"``, 2 features, ``bounds`` the moons box mapped the same way.
    """
    raw = moons(n_train=n_train, n_test=n_test, noise=noise, seed=seed)
    centre, scale, sign = (torch.tensor(v) for v in (LEAK_ALARM_CENTRE, LEAK_ALARM_SCALE, LEAK_ALARM_SIGN))

    def mapped(x: Tensor) -> Tensor:
        return sign * (x - centre) / scale

    ends = torch.stack([mapped(raw.bounds[0]), mapped(raw.bounds[1])])
    return from_arrays(
        mapped(raw.x_train), raw.y_train, mapped(raw.x_test), raw.y_test, classes=["steady", "leak"],
        name="leak_alarm", bounds=(ends.min(0).values, ends.max(0).values), feature_names=LEAK_ALARM_FEATURES,
    )


def _toy_args(n_train, n_test, noise, seed):
    return (
        check_int("n_train", n_train, low=2),
        check_int("n_test", n_test, low=1),
        check_float("noise", noise, low=0.0),
        check_int("seed", seed, low=0),
    )


def _toy_box(*arrays: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A box around the data with a margin of one unit, rounded out to half units."""
    stacked = np.concatenate(arrays)
    lo = np.floor((stacked.min(0) - 1.0) * 2) / 2
    hi = np.ceil((stacked.max(0) + 1.0) * 2) / 2
    return lo, hi


def _bounds(bounds, x: Tensor) -> tuple[Tensor, Tensor]:
    d = x.shape[1]
    if bounds is None:
        span = (x.max(0).values - x.min(0).values).clamp_min(1e-6)
        return x.min(0).values - span / 2, x.max(0).values + span / 2
    if not isinstance(bounds, (tuple, list)) or len(bounds) != 2:
        raise ValueError(f"bounds must be a pair (lo, hi); got {bounds!r}")
    lo = as_float_tensor("bounds[0]", bounds[0], ndim=(0, 1))
    hi = as_float_tensor("bounds[1]", bounds[1], ndim=(0, 1))
    lo, hi = lo.expand(d).clone(), hi.expand(d).clone()
    if bool((lo >= hi).any()):
        raise ValueError(f"bounds must have lo < hi in every feature; got lo={lo.tolist()}, hi={hi.tolist()}")
    return lo, hi


def _spiral_points(n: int, noise: float, turns: float, rng: np.random.Generator):
    labels = np.arange(n) % 2
    t = rng.uniform(0.0, 1.0, size=n)
    radius = 0.2 + 1.8 * t
    angle = 2 * np.pi * turns * t + np.pi * labels
    points = np.stack([radius * np.cos(angle), radius * np.sin(angle)], axis=1)
    points += noise * rng.standard_normal(points.shape)
    return points, labels
