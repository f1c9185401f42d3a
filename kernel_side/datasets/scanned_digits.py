"""The demo scenario's meter cards at scanner resolution, made on the spot with no download.

Derived from scikit-learn's bundled 8x8 digits (a copy of the test part of the UCI Optical
Recognition of Handwritten Digits data, 1,797 images; Alpaydin & Kaynak 1998): each digit is
upsampled with bicubic interpolation, given a small seeded affine distortion (rotation,
scale, shift) and mild scanner noise. Nothing here is new data: every card is one of the
open data set's digits, redrawn.
"""
from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F
from torch import Tensor

from jostle.common.checks import check_int, check_seed, show_value
from jostle.datasets.arrays import stratified_split
from jostle.datasets.dataset import Dataset, from_arrays

__all__ = ["meter_cards", "METER_CARDS_TEST_FRACTION", "ROTATION_DEG", "SHIFT_PX", "SCALE_RANGE", "NOISE_STD"]

#: share of each digit held out as the test set (as :func:`jostle.datasets.digits` does)
METER_CARDS_TEST_FRACTION = 0.3
#: the seeded distortions: rotation up to this many degrees either way
ROTATION_DEG = 10.0
#: shift up to this many output pixels either way, along each axis
SHIFT_PX = 1.5
#: the digit is scaled by a factor drawn uniformly from this range
SCALE_RANGE = (0.9, 1.1)
#: standard deviation of the scanner's Gaussian noise, in [0, 1] pixel units
NOISE_STD = 0.03
#: the largest resolution made (a colour set at 128 already takes 1,797 x 3 x 128 x 128 floats, 353 MB)
MAX_RESOLUTION = 128

#: paper tints of the colour cards (RGB in [0, 1]): cream, pale blue, pale green, off-white, buff
PAPER_TINTS = ((0.96, 0.93, 0.84), (0.87, 0.92, 0.96), (0.90, 0.95, 0.87), (0.97, 0.97, 0.96), (0.93, 0.87, 0.76))
#: ink colours of the colour cards: blue-black, blue, near-black, sepia, dark red, dark green
INK_COLOURS = ((0.08, 0.10, 0.30), (0.10, 0.22, 0.58), (0.06, 0.06, 0.06), (0.36, 0.21, 0.10),
               (0.52, 0.08, 0.10), (0.05, 0.32, 0.16))


def meter_cards(resolution: int = 28, colour: bool = False, seed: int = 0) -> Dataset:
    """Meter cards read by a scanner: the bundled 8x8 digits redrawn at ``resolution``.

    Derived from scikit-learn's bundled 8x8 digits (a copy of the test part of the UCI
    Optical Recognition of Handwritten Digits data): every one of the 1,797 digits,
    values 0..16 scaled to [0, 1], is upsampled to ``resolution`` x ``resolution``
    (bicubic, ``torch.nn.functional.interpolate``), turned by up to +-10 degrees, scaled by
    0.9-1.1 and shifted by up to +-1.5 pixels (``affine_grid`` / ``grid_sample``, drawn with
    ``seed``), given Gaussian scanner noise (std 0.03) and clamped to [0, 1]. Classes keep
    the source's counts; 30% of each digit is the test set.

    Parameters
    ----------
    resolution : int, 8..128
        Height and width of a card in pixels.
    colour : bool
        False: one channel, bright ink on a dark ground, like the 8x8 digits. True: three
        channels, dark ink on tinted paper, the ink colour and paper tint of each card drawn
        with ``seed`` from fixed palettes (``INK_COLOURS``, ``PAPER_TINTS``).
    seed : int
        Seeds one ``torch.Generator`` for the distortions, palette, noise and split; the
        same seed gives the same arrays.

    Returns
    -------
    Dataset
        ``name`` ``"meter_cards"`` (or ``"meter_cards_colour"``), classes ``"0"``-``"9"``,
        ``image_shape = (1 or 3, resolution, resolution)``, bounds ``(0, 1)``.

    Examples
    --------
    >>> data = jostle.datasets.meter_cards()
    >>> data.image_shape, data.x_train.shape[0] + data.x_test.shape[0]
    ((1, 28, 28), 1797)
    """
    resolution = check_int("resolution", resolution, low=8, high=MAX_RESOLUTION)
    if not isinstance(colour, (bool, np.bool_)):
        raise ValueError(f"colour must be True or False; got {show_value(colour)}")
    seed = check_seed(seed)
    from sklearn.datasets import load_digits

    bunch = load_digits()
    ink = torch.from_numpy(bunch.data.astype(np.float32) / 16.0).reshape(-1, 1, 8, 8)
    generator = torch.Generator().manual_seed(seed)
    cards = _scanned(ink, resolution, generator)
    if colour:
        cards = _on_paper(cards, generator)
    cards = (cards + NOISE_STD * torch.randn(cards.shape, generator=generator)).clamp_(0.0, 1.0)
    labels = bunch.target.astype(np.int64)
    train_rows, test_rows = stratified_split(labels, METER_CARDS_TEST_FRACTION, seed, "the meter cards")
    flat = cards.reshape(cards.shape[0], -1)
    return from_arrays(
        flat[torch.from_numpy(train_rows)], labels[train_rows], flat[torch.from_numpy(test_rows)], labels[test_rows],
        classes=[str(d) for d in range(10)], name="meter_cards_colour" if colour else "meter_cards",
        bounds=(0.0, 1.0), image_shape=tuple(cards.shape[1:]),
    )


def _scanned(ink: Tensor, resolution: int, generator: torch.Generator) -> Tensor:
    """Upsampled and distorted ink, shape (N, 1, R, R), in [0, 1]."""
    big = F.interpolate(ink, size=(resolution, resolution), mode="bicubic", align_corners=False)
    theta = _affine(ink.shape[0], resolution, generator)
    grid = F.affine_grid(theta, [ink.shape[0], 1, resolution, resolution], align_corners=False)
    warped = F.grid_sample(big, grid, mode="bilinear", padding_mode="zeros", align_corners=False)
    return warped.clamp_(0.0, 1.0)  # bicubic overshoots a little at sharp strokes


def _affine(n: int, resolution: int, generator: torch.Generator) -> Tensor:
    """Per-card matrices taking output coordinates to input ones (``affine_grid``'s convention).

    The drawn digit is turned by ``angle``, enlarged by ``scale`` and moved by ``shift``:
    a point p of the output samples the input at ``A (p - shift)`` with ``A = R(-angle) / scale``.
    """
    def uniform(low: float, high: float) -> Tensor:
        return low + (high - low) * torch.rand(n, generator=generator)

    angle = torch.deg2rad(uniform(-ROTATION_DEG, ROTATION_DEG))
    scale = uniform(*SCALE_RANGE)
    # normalised coordinates span [-1, 1] over R pixels (align_corners=False), so a pixel is 2 / R
    shift = torch.stack([uniform(-SHIFT_PX, SHIFT_PX), uniform(-SHIFT_PX, SHIFT_PX)], dim=1) * (2.0 / resolution)
    cos, sin = torch.cos(angle) / scale, torch.sin(angle) / scale
    linear = torch.stack([torch.stack([cos, sin], 1), torch.stack([-sin, cos], 1)], 1)  # [N, 2, 2]
    offset = -(linear @ shift.unsqueeze(2))
    return torch.cat([linear, offset], dim=2)


def _on_paper(ink: Tensor, generator: torch.Generator) -> Tensor:
    """Ink of a drawn colour over a drawn paper tint, shape (N, 3, R, R)."""
    paper_tints, ink_colours = torch.tensor(PAPER_TINTS), torch.tensor(INK_COLOURS)
    n = ink.shape[0]
    paper = paper_tints[torch.randint(len(PAPER_TINTS), (n,), generator=generator)].view(n, 3, 1, 1)
    pen = ink_colours[torch.randint(len(INK_COLOURS), (n,), generator=generator)].view(n, 3, 1, 1)
    return paper * (1.0 - ink) + pen * ink
