"""The expected loss gradient as a picture: at a few sample counts S, for one input or many.

An attacker who averages S posterior samples follows the gradient of the mean of their
cross-entropies (Athalye et al. 2018). :func:`gradient_pictures` computes that gradient
for S = 1, 4, 16, 64 and every member in one pass over the members: the members are put
in one seeded order and the S-sample gradient averages the first S of them, so each
larger count adds only the members the smaller one lacks. :func:`dataset_gradients`
does the same for a seeded subset of a data set's test inputs.
"""
from __future__ import annotations

from dataclasses import dataclass
from numbers import Integral
from typing import Any

import numpy as np
import torch

from jostle.attacks.problem import compute_threads
from jostle.common.checks import as_label_tensor, check_int, check_points, check_seed, show_value

__all__ = ["gradient_pictures", "dataset_gradients", "GradientPictures", "PictureStrip",
           "PICTURE_SAMPLES"]

PICTURE_SAMPLES = (1, 4, 16, 64, None)


@dataclass
class PictureStrip:
    """The gradients laid out as images, ready to draw.

    Attributes
    ----------
    images : ndarray of shape (K, n_points, height, width)
    scales : ndarray of shape (K, n_points)
        Each image's own half-range: ``max |value|`` (1.0 where an image is all zero).
    signed : bool
        True: the gradient itself (a diverging scale, ``-scale..scale``). False: its
        magnitude over the colour channels (``0..scale``).
    kind : str
        ``"signed"`` or ``"magnitude over C channels"``, for captions.
    """

    images: np.ndarray
    scales: np.ndarray
    signed: bool
    kind: str


@dataclass
class GradientPictures:
    """The S-sample expected loss gradient at each input, for a few sample counts S.

    Attributes
    ----------
    sample_counts : ndarray of int, shape (K,)
        The counts, ascending, clipped to the ensemble's size and without repeats.
    gradients : ndarray of float64, shape (K, n_points, *input_shape)
        ``gradients[k]``: the input gradient of the mean cross-entropy of the members
        ``order[:sample_counts[k]]``.
    linf, l2 : ndarray of shape (K, n_points)
        Each gradient's L-inf and L2 norm over all of its components.
    component_abs_mean : ndarray of shape (K, n_features)
        Mean over the points of each component's absolute value.
    labels : ndarray of int, shape (n_points,)
        The labels the loss was taken at.
    order : ndarray of int, shape (n_members,)
        The seeded member order (a permutation of the ensemble's members).
    requested : tuple
        The ``samples`` asked for (None meaning every member).
    indices : ndarray of int or None
        Positions of the points in the test set (:func:`dataset_gradients`), else None.
    """

    sample_counts: np.ndarray
    gradients: np.ndarray
    linf: np.ndarray
    l2: np.ndarray
    component_abs_mean: np.ndarray
    labels: np.ndarray
    order: np.ndarray
    requested: tuple
    indices: np.ndarray | None = None

    @property
    def components(self) -> np.ndarray:
        """The gradients flattened per point: shape (K, n_points, n_features)."""
        return self.gradients.reshape(self.gradients.shape[:2] + (-1,))

    def pictures(self, image_shape: Any) -> PictureStrip:
        """The gradients as images of ``image_shape``: ``(H, W)``, ``(1, H, W)`` or ``(C, H, W)``.

        One channel gives the signed gradient; several give its magnitude over the channels
        (the square root of the sum of squares), since a diverging scale cannot show three
        signed channels at once.
        """
        shape = _image_shape(image_shape, int(np.prod(self.gradients.shape[2:])))
        k, n = self.gradients.shape[:2]
        values = self.gradients.reshape((k, n) + shape)
        if shape[0] == 1:
            images, signed, kind = values[:, :, 0], True, "signed"
        else:
            images = np.sqrt((values ** 2).sum(axis=2))
            signed, kind = False, f"magnitude over {shape[0]} channels"
        scales = np.abs(images).reshape(k, n, -1).max(axis=2)
        return PictureStrip(images=images, scales=np.where(scales > 0, scales, 1.0), signed=signed, kind=kind)

    def component_summary(self, image_shape: Any) -> np.ndarray:
        """Mean over the points of each pixel's absolute gradient, as images: shape (K, H, W).

        One channel: :attr:`component_abs_mean` reshaped. Several: the mean over the points
        of the magnitude over the channels, as in :meth:`pictures`.
        """
        strip = self.pictures(image_shape)
        return np.abs(strip.images).mean(axis=1)


def gradient_pictures(ens, x: Any, y: Any = None, samples: Any = PICTURE_SAMPLES, seed: int = 0,
                      backward: str = "auto") -> GradientPictures:
    """The expected loss gradient at ``x`` for several sample counts, in one pass over members.

    Parameters
    ----------
    ens : Ensemble
    x : Tensor of shape (n_points, *input_shape)
    y : Tensor of shape (n_points,), optional
        Labels; None takes the full ensemble's predicted labels (the label an attack moves
        away from).
    samples : sequence of int or None
        Sample counts S; None means every member. Counts above the ensemble's size are
        clipped to it; repeats are dropped.
    seed : int
        Seeds the member order: count S averages the first S members of one permutation
        drawn with ``torch.Generator().manual_seed(seed)``, so the subsets are nested.
    backward : {"auto", "autograd"}
        The gradient engine's switch (see :meth:`jostle.Ensemble.value_and_input_grad`).

    Returns
    -------
    GradientPictures

    Examples
    --------
    >>> import jostle
    >>> ens = jostle.demo_posterior("leak_alarm_hmc")
    >>> out = jostle.gradient_pictures(ens, jostle.datasets.leak_alarm().x_test[:3], samples=(1, 4, None))
    >>> out.gradients.shape[:2], out.linf.shape
    ((3, 3), (3, 3))
    """
    x = check_points("x", x, ens, min_points=1, detach=True)
    counts, requested = _sample_counts(samples, len(ens))
    seed = check_seed(seed)
    generator = torch.Generator().manual_seed(seed)
    order = torch.randperm(len(ens), generator=generator)
    with compute_threads("auto", ens, int(x.shape[0])):
        clean = ens.predict(x)
        labels = clean.label if y is None else as_label_tensor(
            "y", y, n_points=int(x.shape[0]), classes=int(clean.probs.shape[-1])).to(ens.device)
        gradients = _nested_means(ens, x, labels, order, counts, backward)
    flat = gradients.reshape(gradients.shape[:2] + (-1,))
    return GradientPictures(
        sample_counts=np.asarray(counts, dtype=np.int64), gradients=gradients,
        linf=np.abs(flat).max(axis=2), l2=np.sqrt((flat ** 2).sum(axis=2)),
        component_abs_mean=np.abs(flat).mean(axis=1), labels=labels.cpu().numpy().astype(np.int64),
        order=order.numpy().astype(np.int64), requested=requested)


def dataset_gradients(ens, data: Any, points: int = 32, samples: Any = PICTURE_SAMPLES, seed: int = 0,
                       backward: str = "auto") -> GradientPictures:
    """:func:`gradient_pictures` on a seeded subset of ``data``'s test inputs, at their true labels.

    Parameters
    ----------
    ens : Ensemble
    data : Dataset
    points : int
        How many test inputs (all of them when the test set is smaller); chosen without
        replacement with ``seed`` and kept in test-set order (``indices``).
    samples, seed, backward
        As in :func:`gradient_pictures`; ``seed`` also picks the points.

    Returns
    -------
    GradientPictures
        With ``indices`` set.
    """
    if not hasattr(data, "x_test") or not hasattr(data, "y_test"):
        raise ValueError(f"data must be a jostle.Dataset; got {type(data).__name__}")
    total = int(data.x_test.shape[0])
    count = min(check_int("points", points, low=1), total)
    seed = check_seed(seed)
    generator = torch.Generator().manual_seed(seed + 1)  # apart from the member order's stream
    indices = torch.randperm(total, generator=generator)[:count].sort().values
    out = gradient_pictures(ens, data.x_test[indices], data.y_test[indices], samples=samples, seed=seed,
                            backward=backward)
    out.indices = indices.numpy().astype(np.int64)
    return out


# ---------------------------------------------------------------------- helpers
def _sample_counts(samples: Any, members: int) -> tuple[list[int], tuple]:
    if isinstance(samples, (str, bytes)) or not hasattr(samples, "__iter__"):
        raise ValueError(f"samples must be a sequence of integers >= 1 or None (None: every member); "
                         f"got {show_value(samples)}")
    requested = tuple(samples)
    if not requested:
        raise ValueError("samples must hold at least one sample count; got an empty sequence")
    counts = set()
    for entry in requested:
        if entry is None:
            counts.add(members)
            continue
        if isinstance(entry, bool) or not isinstance(entry, Integral) or entry < 1:
            raise ValueError(f"samples entries must be integers >= 1 or None (None: every member); "
                             f"got {show_value(entry)}")
        counts.add(min(int(entry), members))
    return sorted(counts), requested


def _nested_means(ens, x: torch.Tensor, labels: torch.Tensor, order: torch.Tensor, counts: list[int],
                  backward: str) -> np.ndarray:
    """Mean gradient of the first S members of ``order`` for each S, each member visited once."""
    total = np.zeros(tuple(x.shape), dtype=np.float64)
    out = np.empty((len(counts),) + tuple(x.shape), dtype=np.float64)
    done = 0
    for k, count in enumerate(counts):
        if count > done:
            block = order[done:count].tolist()
            _, mean = ens.value_and_input_grad(x, labels, "expected_loss", members=block, backward=backward)
            total += mean.detach().cpu().numpy().astype(np.float64) * len(block)
            done = count
        out[k] = total / count
    return out


def _image_shape(image_shape: Any, features: int) -> tuple[int, int, int]:
    shape = tuple(int(s) for s in image_shape) if isinstance(image_shape, (tuple, list)) else None
    if shape is not None and len(shape) == 2:
        shape = (1,) + shape
    if shape is None or len(shape) != 3 or min(shape) < 1 or int(np.prod(shape)) != features:
        raise ValueError(f"image_shape must be (H, W) or (C, H, W) with {features} values in all; "
                         f"got {show_value(image_shape)}")
    return shape
