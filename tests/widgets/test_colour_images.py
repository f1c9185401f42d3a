"""ImageExplorer on colour 28x28 meter cards: pixels on the wire, the perturbation per channel or as magnitude."""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

import jostle
from jostle.widgets import ImageExplorer
from jostle.widgets._wire import from_wire

from .conftest import tiny_ensemble


@pytest.fixture(scope="module")
def cards():
    return jostle.datasets.meter_cards(resolution=28, colour=True)


@pytest.fixture
def colour_explorer(cards):
    c, h, w = cards.image_shape
    ens = tiny_ensemble(members=4, in_features=c * h * w, classes=len(cards.classes), hidden=(8,),
                        class_names=cards.classes)
    ex = ImageExplorer(ens, cards, strip=5, steps=4, budget=0.1)
    assert ex.wait(120)
    yield ex
    ex.close()


def test_colour_images_reach_the_wire_unchanged(colour_explorer, cards):
    ex, (c, h, w) = colour_explorer, cards.image_shape
    assert (c, h, w) == (3, 28, 28)
    strip = from_wire(ex._strip.get_state()["images"])
    # float32 data sent as float32: a copy, so bit-equal (quantisation step 0)
    np.testing.assert_array_equal(strip, cards.x_test[:5].reshape(5, c, h, w).numpy())
    ex._strip.set_state({"selected": 2})
    assert ex.wait(120) and ex.index == 2
    np.testing.assert_array_equal(from_wire(ex._panels.original), cards.x_test[2].reshape(c, h, w).numpy())


def test_perturbation_per_channel_and_as_magnitude(colour_explorer, cards):
    ex, shape = colour_explorer, cards.image_shape
    x = cards.x_test[0].reshape(shape).numpy().astype(np.float64)
    x_adv = np.asarray(ex.result.attack.x_adv, dtype=np.float64).reshape(shape)
    per_channel = from_wire(ex._panels.perturbation)
    assert per_channel.shape == tuple(shape)
    # x_adv - x in float64, sent as float32: one float32 rounding, relative 2**-24 (float32 eps / 2)
    np.testing.assert_allclose(per_channel, x_adv - x, rtol=6e-8, atol=1e-12)
    np.testing.assert_allclose(from_wire(ex._panels.attacked), x_adv, rtol=6e-8)
    ex._view_choice.value = "magnitude"  # the dropdown under the panels
    assert ex.perturbation_view == "magnitude"
    assert ex.wait(120) and ex.status[0] == "idle"
    magnitude = from_wire(ex._panels.perturbation)
    assert magnitude.shape == tuple(shape[1:])
    # Euclidean norm over the 3 channels (numpy reference), then one float32 rounding
    np.testing.assert_allclose(magnitude, np.linalg.norm(x_adv - x, axis=0), rtol=2e-7, atol=1e-12)


def test_bad_perturbation_view_reaches_the_status_and_the_widget_goes_on(colour_explorer):
    ex = colour_explorer
    ex.set_state({"perturbation_view": "rainbow"})
    assert ex.wait(120)
    assert ex.status[0] == "error"
    assert "perturbation_view must be one of channels, magnitude; got 'rainbow'" in ex.status[1]
    assert ex.perturbation_view == "channels"
    ex.set_state({"index": 1})
    assert ex.wait(120) and ex.status[0] == "idle" and ex.index == 1


def test_image_explorer_refuses_a_bad_image_shape(cards):
    bad = dataclasses.replace(cards, image_shape=(2, 28, 28))
    ens = tiny_ensemble(members=2, in_features=3 * 28 * 28, classes=len(cards.classes), hidden=(4,))
    refusal = r"data must have an image_shape \(H, W\), \(1, H, W\) or \(3, H, W\) for ImageExplorer; got \(2, 28, 28\)"
    with pytest.raises(ValueError, match=refusal):
        ImageExplorer(ens, bad)
