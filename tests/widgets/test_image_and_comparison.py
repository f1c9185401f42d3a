"""ImageExplorer on the 8x8 digits and Comparison of two posteriors, driven through traits."""
from __future__ import annotations

import numpy as np
import pytest
import torch
import traitlets

import jostle
from jostle.widgets import Comparison, ImageExplorer
from jostle.widgets._wire import from_wire

from .conftest import tiny_ensemble


@pytest.fixture(scope="module")
def digits():
    return jostle.datasets.digits(seed=0)


@pytest.fixture
def image_explorer(digits):
    ens = tiny_ensemble(members=4, in_features=64, classes=10, hidden=(8,), class_names=digits.classes)
    ex = ImageExplorer(ens, digits, strip=6, steps=4, budget=0.1)
    assert ex.wait(60)
    yield ex
    ex.close()


def test_image_explorer_shows_the_chosen_test_image(image_explorer, digits):
    ex = image_explorer
    strip = from_wire(ex._strip.get_state()["images"])
    np.testing.assert_allclose(strip, digits.x_test[:6].reshape(6, 8, 8).numpy(), rtol=1e-6)
    assert ex._strip.captions[0] == f"test image 0: class {digits.classes[int(digits.y_test[0])]}"
    ex._strip.set_state({"selected": 3})  # a click on the fourth thumbnail
    assert ex.wait(60)
    assert ex.index == 3
    np.testing.assert_allclose(from_wire(ex._panels.original), digits.x_test[3].reshape(8, 8).numpy(), rtol=1e-6)
    expected = ex._ens.predict(digits.x_test[3:4])
    np.testing.assert_allclose(ex.result.before.probs, expected.probs[0].numpy(), rtol=1e-6)


def test_image_explorer_bad_index_and_budget_reach_the_status(image_explorer):
    ex = image_explorer
    ex._strip.set_state({"selected": 6})
    assert ex.wait(60)
    assert ex.status[0] == "error" and "index must be an integer in [0, 5]; got 6" in ex.status[1]
    assert ex.index == 0 and ex._strip.selected == 0
    ex.set_state({"budget": float("nan")})
    assert ex.wait(60) and "budget must be a finite float >= 0; got nan" in ex.status[1]
    ex.set_state({"budget": 0.2, "index": 1})
    assert ex.wait(60) and ex.status[0] == "idle" and ex.result.state.budget == 0.2


def test_panels_view_revision_counts_the_views_sent(image_explorer):
    ex = image_explorer
    assert ex._panels.view_revision == ex.worker.runs == 1  # one view so far: the first
    for k, budget in enumerate((0.15, 0.2), start=2):
        ex.budget = budget
        assert ex.wait(60)
        assert ex._panels.view_revision == k and ex.result.state.budget == budget


def test_image_explorer_refuses_data_without_images(moons, ens):
    refusal = r"data must have an image_shape \(H, W\), \(1, H, W\) or \(3, H, W\) for ImageExplorer; got None"
    with pytest.raises(ValueError, match=refusal):
        ImageExplorer(ens, moons)


def test_image_panels_hold_the_attack_from_jostle_attack(image_explorer, digits):
    ex = image_explorer
    view = ex.result
    x = digits.x_test[:1]
    adv = jostle.attack(ex._ens, x, y=torch.tensor([view.label]), method="pgd", eps=0.1, norm="inf", steps=4,
                        samples=4, objective="expected_loss", seed=0)
    delta = (adv.x_adv - x)[0].reshape(8, 8).numpy()
    np.testing.assert_allclose(from_wire(ex._panels.perturbation), delta, atol=1e-6)
    assert np.abs(delta).max() <= 0.1 + 1e-6
    assert ex._panels.max_abs == pytest.approx(float(np.abs(delta).max()), abs=1e-6)


def test_comparison_shares_input_budget_and_clipped_sample_count(moons):
    deterministic = tiny_ensemble(members=1, seed=3)
    posterior = tiny_ensemble(members=5, seed=4)
    comparison = Comparison([posterior, deterministic], moons, labels=["five samples", "one net"],
                            grid=8, steps=2, boundaries=2)
    try:
        assert comparison.wait(60)
        first, second = comparison.explorers
        first._map.set_state({"point": [0.4, -0.3]})
        first.budget = 0.12
        first.samples = 4
        assert comparison.wait(60)
        assert second.result.state.point == (0.4, -0.3) and second.result.state.budget == 0.12
        assert second.samples == 1 and first.samples == 4  # clipped to the deterministic net's S = 1
        np.testing.assert_allclose(second.result.before.probs,
                                   deterministic.predict(torch.tensor([[0.4, -0.3]])).probs[0].numpy(), rtol=1e-6)
        assert second.status[0] == "idle"
    finally:
        comparison.close()


def test_comparison_checks_its_arguments(moons, ens):
    with pytest.raises(ValueError, match="ensembles must hold at least 2 posteriors to compare; got 1"):
        Comparison([ens], moons)
    with pytest.raises(ValueError, match="labels must name each of the 2 ensembles; got 1"):
        Comparison([ens, ens], moons, labels=["a"])


def test_image_explorer_constructor_checks_index_and_strip(digits):
    ens = tiny_ensemble(members=2, in_features=64, classes=10, hidden=(4,))
    with pytest.raises(ValueError, match=r"index must be an integer in \[0, 3\]; got 4"):
        ImageExplorer(ens, digits, strip=4, index=4)
    with pytest.raises(ValueError, match=r"strip must be an integer >= 1; got 0"):
        ImageExplorer(ens, digits, strip=0)


@pytest.mark.parametrize("deterministic_first", [True, False])
def test_comparison_shares_samples_over_the_largest_ensemble_in_either_order(moons, deterministic_first):
    # the rule under test: column k attacks with min(shared, S_k), whatever the column order
    deterministic, posterior = tiny_ensemble(members=1, seed=3), tiny_ensemble(members=5, seed=4)
    ensembles = [deterministic, posterior] if deterministic_first else [posterior, deterministic]
    comparison = Comparison(ensembles, moons, grid=8, steps=2, boundaries=2)
    try:
        assert comparison.wait(60)
        sizes = [len(e) for e in ensembles]
        assert comparison.samples == 5 and comparison.samples_control.max == 5
        assert [ex.result.state.samples for ex in comparison.explorers] == [min(5, s) for s in sizes]
        notes = {len(ex._ens): ex._controls.samples_note for ex in comparison.explorers}
        assert notes == {1: "1 of 1", 5: "5 of 5"}
        big = comparison.explorers[sizes.index(5)]
        big.samples = 3  # the big column's own slider sets the shared value
        assert comparison.wait(60)
        assert comparison.samples == 3 and comparison.used_samples() == [min(3, s) for s in sizes]
        assert big.result.state.samples == 3 and big._controls.samples_note == "3 of 5"
        comparison.samples_control.value = 2
        assert comparison.wait(60)
        assert [ex.result.state.samples for ex in comparison.explorers] == [min(2, s) for s in sizes]
        with pytest.raises(traitlets.TraitError, match=r"samples must be an integer in \[1, 5\]; got 6"):
            comparison.samples = 6
    finally:
        comparison.close()


def test_comparison_checks_the_shared_sample_count(moons):
    with pytest.raises(ValueError, match=r"samples must be an integer in \[1, 5\]; got 9"):
        Comparison([tiny_ensemble(members=1), tiny_ensemble(members=5)], moons, samples=9, grid=8)
