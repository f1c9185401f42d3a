"""The expected-gradient strip of ImageExplorer and the GradientComponents view, driven through traits.

References: jostle.gradient_pictures / jostle.dataset_gradients, themselves checked against
expected_gradient, torch.autograd and Gauss-Hermite quadrature in tests/kernel_side.
"""
from __future__ import annotations

import numpy as np
import pytest

import jostle
import jostle.live.engine as live
from jostle.widgets import GradientComponents, ImageExplorer
from jostle.widgets._gradient_strip_part import GradientStripPart
from jostle.widgets._live_box import LiveBox
from jostle.widgets._wire import from_wire

from .conftest import tiny_ensemble

FLOAT32 = 1.2e-7  # images cross the wire as float32: one rounding of float64 values


@pytest.fixture(scope="module")
def digits():
    return jostle.datasets.digits(seed=0)


@pytest.fixture(scope="module")
def digits_ensemble(digits):
    return tiny_ensemble(members=20, in_features=64, classes=10, hidden=(8,), class_names=digits.classes)


@pytest.fixture
def explorer(digits, digits_ensemble):
    ex = ImageExplorer(digits_ensemble, digits, strip=6, steps=4, samples=5, seed=3)
    assert ex.wait(60)
    yield ex
    ex.close()


def _expected(ens, x, label, samples, seed):
    return jostle.gradient_pictures(ens, x, [label], samples=(1, 4, 16, 64, None, samples), seed=seed)


def test_strip_shows_the_expected_gradient_at_the_chosen_image(explorer, digits, digits_ensemble):
    strip = explorer._gradient_strip
    reference = _expected(digits_ensemble, digits.x_test[:1], explorer.result.label, 5, 3)
    assert strip.sample_counts == [1, 4, 5, 16, 20]  # 64 and all clip to 20; the attacker's 5 joins
    assert strip.highlighted == 2 and strip.signed
    images = from_wire(strip.images)
    assert images.shape == (5, 8, 8)
    np.testing.assert_allclose(images, reference.gradients[:, 0].reshape(5, 8, 8), rtol=FLOAT32, atol=0)
    np.testing.assert_array_equal(strip.norms, reference.linf[:, 0])  # float64 copied as is
    np.testing.assert_array_equal(strip.scales, reference.linf[:, 0])  # one channel: scale = max |g|
    assert strip.captions[0] == f"S = 1\nL-inf {reference.linf[0, 0]:.3g}"
    assert strip.captions[-1].startswith("S = 20 (all)\nL-inf ")
    assert "each image on its own scale" in strip.note.lower()


def test_strip_follows_the_image_and_the_samples(explorer, digits, digits_ensemble):
    strip = explorer._gradient_strip
    explorer._strip.set_state({"selected": 4})  # a click on the fifth thumbnail
    assert explorer.wait(60) and explorer.status[0] == "idle"
    reference = _expected(digits_ensemble, digits.x_test[4:5], explorer.result.label, 5, 3)
    np.testing.assert_allclose(from_wire(strip.images), reference.gradients[:, 0].reshape(5, 8, 8),
                               rtol=FLOAT32, atol=0)
    explorer.set_state({"samples": 16})
    assert explorer.wait(60)
    assert strip.sample_counts == [1, 4, 16, 20] and strip.highlighted == 2
    assert "gradient strip" in explorer.status[1]
    explorer.set_state({"budget": 0.05})  # the attack alone changes: the strip is kept
    assert explorer.wait(60) and explorer.status[0] == "idle"
    assert "gradient strip" not in explorer.status[1]


def test_strip_on_meter_cards_at_scanner_resolution():
    cards = jostle.datasets.meter_cards(resolution=28, seed=0)
    ens = tiny_ensemble(members=3, in_features=784, classes=10, hidden=(6,), class_names=cards.classes)
    ex = ImageExplorer(ens, cards, strip=2, steps=2, seed=0)
    try:
        assert ex.wait(120) and ex.status[0] == "idle", ex.status
        strip = ex._gradient_strip
        assert strip.sample_counts == [1, 3] and strip.highlighted == 1
        assert from_wire(strip.images).shape == (2, 28, 28)
    finally:
        ex.close()


def test_components_view_draws_every_component_at_each_count(digits, digits_ensemble):
    view = GradientComponents(digits_ensemble, digits, points=12, samples=(1, 4, None), seed=1)
    reference = jostle.dataset_gradients(digits_ensemble, digits, points=12, samples=(1, 4, None), seed=1)
    np.testing.assert_array_equal(view.gradients.indices, reference.indices)
    heat = from_wire(view.heat)
    assert heat.shape == (3, 12, 64) and view.sample_counts == [1, 4, 20]
    np.testing.assert_allclose(heat, reference.components, rtol=FLOAT32, atol=0)
    summary = from_wire(view.summary)
    np.testing.assert_allclose(summary, reference.component_abs_mean.reshape(3, 8, 8), rtol=2 * FLOAT32, atol=0)
    np.testing.assert_allclose(view.heat_scales, np.abs(reference.components).reshape(3, -1).max(axis=1), rtol=0)
    assert view.summary_scale == pytest.approx(float(reference.component_abs_mean.max()), rel=1e-15)
    np.testing.assert_allclose(view.component_means, reference.component_abs_mean.mean(axis=1), rtol=1e-15)
    assert view.captions[0].startswith(f"mean |component| {reference.component_abs_mean[0].mean():.3g}\n")
    assert "12 test inputs" in view.note and "64 input components" in view.note


def test_components_view_of_colour_cards_and_of_plain_features(moons, ens):
    colour = jostle.datasets.meter_cards(resolution=8, colour=True, seed=0)
    net = tiny_ensemble(members=2, in_features=192, classes=10, hidden=(4,))
    view = GradientComponents(net, colour, points=4, samples=(1, None))
    assert from_wire(view.heat).shape == (2, 4, 192) and from_wire(view.summary).shape == (2, 8, 8)
    assert "magnitude over 3 channels" in view.note
    plain = GradientComponents(ens, moons, points=5, samples=(1, 2))
    assert from_wire(plain.summary).shape == (2, 1, 2)


def test_components_view_refuses_bad_arguments(digits, digits_ensemble):
    with pytest.raises(ValueError, match=r"ens must be a jostle.Ensemble; got str"):
        GradientComponents("net", digits)
    with pytest.raises(ValueError, match=r"points must be an integer >= 1; got 0"):
        GradientComponents(digits_ensemble, digits, points=0)
    with pytest.raises(ValueError, match=r"seed must be an integer >= 0; got -2"):
        GradientComponents(digits_ensemble, digits, seed=-2)
    with pytest.raises(ValueError, match=r"samples entries must be integers >= 1 or None"):
        GradientComponents(digits_ensemble, digits, samples=(0,))


def test_components_view_names_itself(digits, digits_ensemble):
    view = GradientComponents(digits_ensemble, digits, points=3, samples=(1, None))
    assert repr(view) == "GradientComponents(points=3, sample_counts=[1, 20])"


class _ColourHost(GradientStripPart, LiveBox):
    """The smallest live box carrying the strip, for colour inputs (ImageExplorer takes greyscale only)."""

    def __init__(self, ens, data):
        self._point, self._bounds = tuple(data.x_test[0].tolist()), None
        self._setup_live(ens, {"samples": None}, budget_max=0.5)
        section = self._setup_gradient_strip(data.image_shape)
        super().__init__(children=[section, self._status])
        with self.hold_trait_notifications():
            self.samples, self.steps = len(ens), 2
        self._start_live()

    def _state(self):
        return live.ExplorerState(point=self._point, samples=self.samples, steps=self.steps, grid=0, boundaries=0)

    def _apply(self, view):
        pass


def test_strip_of_colour_cards_shows_the_magnitude_over_channels():
    cards = jostle.datasets.meter_cards(resolution=8, colour=True, seed=0)
    ens = tiny_ensemble(members=3, in_features=192, classes=10, hidden=(4,))
    host = _ColourHost(ens, cards)
    try:
        assert host.wait(60) and host.status[0] == "idle", host.status
        strip = host._gradient_strip
        reference = jostle.gradient_pictures(ens, cards.x_test[:1], samples=(1, 4, 16, 64, None, 3))
        channels = reference.gradients[:, 0].reshape(2, 3, 8, 8)
        assert not strip.signed and "magnitude over 3 channels" in strip.note
        np.testing.assert_allclose(from_wire(strip.images), np.sqrt((channels ** 2).sum(axis=1)), rtol=FLOAT32, atol=0)
        np.testing.assert_array_equal(strip.norms, reference.linf[:, 0])  # L-inf over every component
    finally:
        host.close()
