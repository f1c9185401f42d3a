"""The meter cards: scikit-learn's bundled 8x8 digits redrawn at scanner resolution.

Source facts (scikit-learn documentation of ``load_digits``; CHECKS.md): 1,797 images of
10 classes, a copy of the test part of the UCI Optical Recognition of Handwritten Digits data.
"""
import re

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from sklearn.datasets import load_digits

from jostle import datasets
from jostle.datasets.scanned_digits import PAPER_TINTS


@pytest.fixture(scope="module")
def grey():
    return datasets.meter_cards()


@pytest.fixture(scope="module")
def colour():
    return datasets.meter_cards(colour=True)


def test_shapes_names_and_bounds(grey, colour):
    assert grey.image_shape == (1, 28, 28) and grey.n_features == 784 and grey.name == "meter_cards"
    assert colour.image_shape == (3, 28, 28) and colour.n_features == 2352 and colour.name == "meter_cards_colour"
    for data in (grey, colour):
        assert data.x_train.shape[0] + data.x_test.shape[0] == 1797 and data.classes == [str(d) for d in range(10)]
        assert data.x_train.dtype == torch.float32
        assert data.bounds[0].tolist() == [0.0] * data.n_features and data.bounds[1].tolist() == [1.0] * data.n_features
        every = torch.cat([data.x_train, data.x_test])
        assert float(every.min()) >= 0.0 and float(every.max()) <= 1.0
    small = datasets.meter_cards(resolution=12, seed=1)
    assert small.image_shape == (1, 12, 12) and small.x_test.shape[1] == 144


def test_class_counts_are_the_sources(grey, colour):
    source = np.bincount(load_digits().target, minlength=10)
    for data in (grey, colour):
        counts = np.bincount(np.concatenate([data.y_train.numpy(), data.y_test.numpy()]), minlength=10)
        np.testing.assert_array_equal(counts, source)
        # 30% of each digit is held out, rounded
        np.testing.assert_array_equal(np.bincount(data.y_test.numpy(), minlength=10), np.round(0.3 * source))


def test_same_seed_same_cards_other_seed_other_cards(grey):
    again = datasets.meter_cards()
    # the same seeded generator and kernels on the same input, one process: exact
    assert torch.equal(again.x_train, grey.x_train) and torch.equal(again.y_test, grey.y_test)
    other = datasets.meter_cards(seed=1)
    assert not torch.equal(other.x_train, grey.x_train)
    twice = [datasets.meter_cards(colour=True, seed=2) for _ in range(2)]
    assert torch.equal(twice[0].x_test, twice[1].x_test)


def test_cards_are_the_digits_redrawn(grey):
    # Averaging a card back down to 8x8 must land nearest its own source digit among all 1,797
    # for most cards: the distortions are small (rotation 10 deg, shift 1.5 px, scale 10%).
    source = torch.from_numpy(load_digits().data.astype(np.float32) / 16)
    small = F.adaptive_avg_pool2d(grey.x_test[:100].reshape(-1, 1, 28, 28), 8).reshape(100, 64)
    nearest = torch.cdist(small, source).argmin(1)
    labels = torch.from_numpy(load_digits().target)[nearest]
    assert float((labels == grey.y_test[:100]).float().mean()) > 0.9


def test_colour_cards_are_dark_ink_on_pale_paper(colour):
    images = colour.x_train[:50].reshape(50, 3, 28, 28)
    corners = images[:, :, :3, :3].mean(dim=(2, 3))  # the digits leave their corners blank
    tints = torch.tensor(PAPER_TINTS)
    # noise of std 0.03 averaged over 9 pixels: within 0.1 of a palette tint
    assert float(torch.cdist(corners, tints).min(1).values.max()) < 0.1
    assert float(images.amin(dim=(1, 2, 3)).max()) < 0.5  # every card has dark ink somewhere


@pytest.mark.parametrize("colour_cards", [False, True])
def test_a_linear_classifier_reads_the_cards_far_above_chance(colour_cards, grey, colour):
    data = colour if colour_cards else grey
    generator = torch.Generator().manual_seed(0)
    weights = (0.01 * torch.randn(data.n_features, 10, generator=generator)).requires_grad_()
    bias = torch.zeros(10, requires_grad=True)
    optimiser = torch.optim.Adam([weights, bias], lr=0.05)
    for _ in range(80):  # full-batch Adam steps; colour cards need about this many
        optimiser.zero_grad()
        F.cross_entropy(data.x_train @ weights + bias, data.y_train).backward()
        optimiser.step()
    accuracy = float(((data.x_test @ weights + bias).argmax(1) == data.y_test).float().mean())
    assert accuracy > 0.75, accuracy  # chance is 0.1 (10 balanced classes)


def test_meter_card_arguments_are_checked():
    with pytest.raises(ValueError, match=re.escape("resolution must be an integer in [8, 128]; got 7")):
        datasets.meter_cards(resolution=7)
    with pytest.raises(ValueError, match="colour must be True or False; got 'yes'"):
        datasets.meter_cards(colour="yes")
    with pytest.raises(ValueError, match="seed must be an integer >= 0; got -1"):
        datasets.meter_cards(seed=-1)


def test_from_arrays_reads_image_shapes_as_channels_first():
    x, y = np.zeros((4, 6)), np.array([0, 1, 0, 1])
    assert datasets.from_arrays(x, y, x, y, image_shape=(2, 3)).image_shape == (1, 2, 3)
    data = datasets.from_arrays(x, y, x, y, image_shape=(3, 1, 2))
    assert data.image_shape == (3, 1, 2) and data.feature_names[:2] == ["red 0,0", "red 0,1"]
    refusal = "image_shape must be (H, W) or (C, H, W) of positive sizes; got (6,)"
    with pytest.raises(ValueError, match=re.escape(refusal)):
        datasets.from_arrays(x, y, x, y, image_shape=(6,))
    assert datasets.digits().feature_names[9] == "pixel 1,1"
