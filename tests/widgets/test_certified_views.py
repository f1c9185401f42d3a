"""Certified read-outs in the widgets against jostle.certify, certified_radius and minimal_budget called directly.

The certified radius is a lower bound on the smallest flipping budget (Gowal et al. 2018 IBP;
Zhang et al. 2018 CROWN); the attack's smallest flipping budget is an upper bound; the
posterior-mass figure is a one-sided Clopper-Pearson bound (Clopper & Pearson 1934).
"""
from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
import torch

import jostle
from jostle.live.certified_parts import RADIUS_ITERATIONS, budget_words, radius_words
from jostle.widgets import Comparison, Explorer, ImageExplorer

from .conftest import tiny_ensemble


def _box(data, dtype):
    return tuple(torch.as_tensor(np.asarray(b, dtype=float), dtype=dtype) for b in data.bounds)


@pytest.fixture
def explorer(ens, moons):
    ex = Explorer(ens, moons, budget=0.2, steps=8, grid=8, boundaries=2)
    assert ex.wait(120)
    yield ex
    ex.close()


def test_radius_and_flip_shown_equal_the_direct_calls(explorer, ens, moons):
    view = explorer.result.radius
    x = torch.tensor([explorer.point], dtype=ens.dtype)
    box = _box(moons, ens.dtype)
    direct = jostle.certified_radius(ens[: explorer.samples], x, bounds=box)
    # The worker thread may run another intra-op thread count (other reduction order); a verdict
    # flipped by rounding at a midpoint moves the bisection's end by at most the final bracket,
    # diameter / 2**iterations, so two of them bound the difference.
    resolution = float((box[1] - box[0]).max()) / 2**RADIUS_ITERATIONS
    assert view.resolution == pytest.approx(resolution)
    assert view.radius == pytest.approx(float(direct.eps[0]), abs=2 * resolution)
    assert explorer._map.certified_radius == pytest.approx(view.radius, rel=1e-6)  # float64 -> trait, no arithmetic
    flip = jostle.minimal_budget(ens[: explorer.samples], x, bounds=box)
    assert view.flip == pytest.approx(float(flip.eps[0]), abs=2 * resolution)
    # soundness: the proved radius never exceeds a flip the attack found (certified <= exact <= attack)
    assert view.radius <= view.flip
    assert f"r = {view.radius:.3g}" in explorer._certified_text.value
    assert f"e = {view.flip:.3g}" in explorer._certified_text.value
    assert "sampled members" in explorer._certified_caution.value


def test_budget_change_rewords_without_recomputing_the_radius(explorer):
    radius = explorer.result.radius.radius
    explorer.budget = round(radius / 2, 4)
    assert explorer.wait(120)
    assert "radius" not in explorer.result.recomputed
    assert "certified, no flip is possible" in explorer._certified_text.value
    explorer.budget = round(min(explorer.result.radius.flip, 2.0) * 0.5 + radius * 0.5, 4)
    assert explorer.wait(120)
    assert "radius" not in explorer.result.recomputed
    assert "certified, no flip" not in explorer._certified_text.value


def test_words_follow_the_cases():
    both = radius_words(0.083, 0.142, "inf", "crown", 4.0)
    assert both.startswith("No flip is possible within r = 0.083 (L-inf ball, certified, CROWN)")
    assert "the attack flipped at e = 0.142; between them, unknown." in both
    nothing = radius_words(0.0, 0.142, "2", "ibp", 4.0)
    assert "Nothing is certified here (r = 0, IBP)" in nothing and "proves nothing either way" in nothing
    assert "between them" not in nothing
    no_flip = radius_words(0.3, math.inf, "inf", "crown", 4.0)
    assert "found no flip up to e = 4" in no_flip and "evidence, not proof" in no_flip
    assert radius_words(0.3, 0.5, "inf", "crown", 4.0, budget=0.2).endswith("certified, no flip is possible.")
    assert radius_words(0.3, 0.5, "inf", "crown", 4.0, budget=0.4).endswith("eps = 0.4: unknown.")
    assert "a flip exists" in radius_words(0.3, 0.5, "inf", "crown", 4.0, budget=0.6)
    assert "a flip exists" in radius_words(0.3, 0.5, "inf", "crown", 4.0, budget=0.4, flipped_at_budget=True)
    words = budget_words(3, 4, 0.25, False, 0.1, "inf", "crown")
    assert "3 of 4 members certified" in words and ">= 25.0%" in words and "not certified" in words


def test_a_bad_layer_shows_in_the_status_and_the_widget_keeps_working(explorer):
    explorer.set_state({"layer": "proved"})
    assert explorer.wait(120)
    state, text = explorer.status
    assert state == "error" and "layer must be one of" in text
    explorer.set_state({"layer": "certified"})
    assert explorer.wait(120)
    assert explorer.status[0] == "idle"
    assert explorer.radius_map is not None and explorer.radius_map.radius.shape == (8, 8)


def test_an_uncovered_layer_is_reported_and_the_rest_still_shown(moons):
    nets = [jostle.mlp(2, 2, hidden=(4,), activation="relu") for _ in range(2)]
    for net in nets:  # a layer the bounds do not cover
        net.insert(1, torch.nn.LayerNorm(4))
    ens = jostle.Ensemble.from_modules(nets)
    ex = Explorer(ens, moons, steps=4, grid=4, boundaries=0)
    try:
        assert ex.wait(120)
        state, text = ex.status  # not a wrong setting: a note, the status stays idle
        assert state == "idle" and "no certificate: " in text
        assert ex.result.attack is not None and ex.result.radius is None
        assert "unavailable" in ex._certified_text.value
        ex.budget = 0.05
        assert ex.wait(120) and ex.result.state.budget == 0.05
    finally:
        ex.close()


def test_certified_layer_equals_the_direct_map_and_coarse_comes_first(ens, moons):
    from jostle.live.certified_map import map_levels, radius_map
    ex = Explorer(ens, moons, steps=4, grid=8, boundaries=0, layer="certified")
    try:
        assert ex.wait(120)
        lo, hi = (tuple(float(v) for v in b) for b in moons.bounds)
        direct = radius_map(ens, ex.samples, 8, lo, hi, method="ibp")
        # same kernel and inputs in one process, but possibly another thread count: two brackets (see above)
        np.testing.assert_allclose(ex.radius_map.radius, direct.radius, atol=2 * direct.resolution)
        assert map_levels(64) == (16, 32, 64) and map_levels(8) == (4, 8)
        assert "8 x 8 of 8 x 8" in ex._map.radius_layer_note
    finally:
        ex.close()


def test_image_explorer_counts_members_certified_at_the_budget():
    digits = jostle.datasets.digits(seed=0)
    ens = tiny_ensemble(members=4, in_features=64, classes=10, hidden=(8,), class_names=digits.classes)
    ex = ImageExplorer(ens, digits, strip=3, steps=4, budget=0.01)
    try:
        assert ex.wait(120)
        shown = ex.result.budget_certificate
        x = digits.x_test[:1].to(ens.dtype)
        cert = jostle.certify(ens, x, eps=0.01, bounds=_box(digits, ens.dtype))
        assert shown.certified == int(cert.members[:, 0].sum())  # integer count
        assert shown.share_lower == pytest.approx(float(cert.share_lower[0]), abs=1e-12)  # same scipy call
        assert f"{shown.certified} of 4 members certified" in ex._certified_text.value
        ex.budget = 0.3
        assert ex.wait(120)
        assert ex.result.budget_certificate.budget == 0.3
    finally:
        ex.close()


def test_image_explorer_certificate_ibp_off_and_refused():
    digits = jostle.datasets.digits(seed=0)
    ens = tiny_ensemble(members=4, in_features=64, classes=10, hidden=(8,), class_names=digits.classes)
    ex = ImageExplorer(ens, digits, strip=3, steps=4, budget=0.02, certificate="ibp")
    try:
        assert ex.wait(120)
        shown = ex.result.budget_certificate
        x = digits.x_test[:1].to(ens.dtype)
        cert = jostle.certify(ens, x, eps=0.02, method="ibp", bounds=_box(digits, ens.dtype))
        assert shown.method == "ibp" and shown.certified == int(cert.members[:, 0].sum())  # integer count
        assert "IBP" in ex._certified_text.value
    finally:
        ex.close()
    ex = ImageExplorer(ens, digits, strip=3, steps=4, certificate="off")
    try:
        assert ex.wait(120)
        assert ex.result.budget_certificate is None and ex._certified_text.value == "certificate: off"
        assert "budget_certificate" not in ex.result.recomputed
    finally:
        ex.close()
    with pytest.raises(ValueError, match=r"certificate must be one of .*crown.*; got 'exact'"):
        ImageExplorer(ens, digits, strip=3, certificate="exact")


def test_comparison_shows_both_radii_per_posterior(moons):
    first, second = tiny_ensemble(members=3, seed=1), tiny_ensemble(members=1, seed=2)
    comparison = Comparison([first, second], moons, steps=4, grid=4, boundaries=0)
    try:
        assert comparison.wait(120)
        radii = comparison.radii()
        assert len(radii) == 2 and all(r is not None for r in radii)
        for found, explorer in zip(radii, comparison.explorers):
            assert found.radius <= found.flip
            assert found.words == explorer._certified_text.value
            assert "r = " in found.words or "Nothing is certified" in found.words
    finally:
        comparison.close()


def test_budget_and_point_changes_do_not_wait_for_the_radius_layer(ens, moons, monkeypatch):
    import threading

    import jostle.widgets.explorer as explorer_module
    release, entered = threading.Event(), threading.Event()
    real = explorer_module.radius_map_levels

    def held(*args, **kwargs):  # the layer's first level stays in progress until released
        entered.set()
        assert release.wait(120)
        yield from real(*args, **kwargs)

    monkeypatch.setattr(explorer_module, "radius_map_levels", held)
    ex = Explorer(ens, moons, steps=4, grid=8, boundaries=0, layer="certified")
    try:
        assert entered.wait(120)
        ex.budget, ex.point = 0.07, [0.2, 0.3]
        assert ex.worker.wait(120)  # the views' worker finishes while the layer is still held
        assert not release.is_set() and ex.result.state.budget == 0.07 and ex.result.state.point == (0.2, 0.3)
        assert ex._map.ball_budget == 0.07 and ex.radius_map is None
        release.set()
        assert ex.wait(120) and ex.radius_map.radius.shape == (8, 8)
    finally:
        release.set()
        ex.close()


def test_image_explorer_picks_ibp_for_convolutional_networks_and_draws_the_panels_first():
    from jostle.live.certified_parts import default_certificate

    cards = jostle.datasets.meter_cards(resolution=12)
    g = torch.Generator().manual_seed(0)
    cnn = jostle.Ensemble.from_modules([jostle.init_parameters(jostle.cnn(cards.image_shape, 10, channels=(2,)), g)
                                        for _ in range(3)])
    assert default_certificate(cnn) == "ibp"
    assert default_certificate(tiny_ensemble(members=2, in_features=4, classes=3, hidden=(4,))) == "crown"
    ex = ImageExplorer(cnn, cards, strip=2, steps=3, budget=0.02)
    try:
        assert ex.wait(120)
        final = ex.result
        x = cards.x_test[:1].to(cnn.dtype)
        cert = jostle.certify(cnn, x, eps=0.02, method="ibp", bounds=_box(cards, cnn.dtype))
        assert final.budget_certificate.method == "ibp"
        assert final.budget_certificate.certified == int(cert.members[:, 0].sum())  # integer count
        assert np.isnan(final.attack.label_prob).all()  # no path chart here: no path predictive
        # the view drawn early says the certificate is coming; the full view then adds only the words
        revision = ex._panels.view_revision
        early = replace(final, budget_certificate=None)
        ex._show_early(early)
        assert ex._certified_text.value == "certificate: computing" and ex._panels.view_revision == revision
        ex._apply(final)
        assert ex._certified_text.value == final.budget_certificate.words and ex._panels.view_revision == revision
    finally:
        ex.close()
