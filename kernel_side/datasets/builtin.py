"""Built-in data sets, seeded and deterministic, with no downloads.

The 2-D toy sets come from scikit-learn's generators (``make_moons``, ``make_circles``)
or a generator written here (``spirals``); ``digits`` is scikit-learn's bundled copy of
the UCI Optical Recognition of Handwritten Digits data (test part: 1,797 8x8 images).
"""
from __future__ import annotations

import numpy as np
import torch
from torch import Tensor

from jostle.common.checks import check_float, check_int
from jostle.datasets.dataset import Dataset, from_arrays

__all__ = ["moons", "circles", "spirals", "digits", "leak_alarm", "TEST_SEED_OFFSET"]

#: test sets use ``random_state = seed + TEST_SEED_OFFSET``; train sets use ``seed`` itself
TEST_SEED_OFFSET = 10_000


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
    ``image_shape`` is ``(1, 8, 8)``; features are named ``pixel r,c``.
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
    return from_arrays(
        xtr, ytr, xte, yte, classes=[str(d) for d in range(10)], name="digits",
        bounds=(0.0, 1.0), image_shape=(1, 8, 8),
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


def _spiral_points(n: int, noise: float, turns: float, rng: np.random.Generator):
    labels = np.arange(n) % 2
    t = rng.uniform(0.0, 1.0, size=n)
    radius = 0.2 + 1.8 * t
    angle = 2 * np.pi * turns * t + np.pi * labels
    points = np.stack([radius * np.cos(angle), radius * np.sin(angle)], axis=1)
    points += noise * rng.standard_normal(points.shape)
    return points, labels
