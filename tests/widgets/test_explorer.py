"""The Explorer driven as the front end would: set_state / traits, then wait for the worker."""
from __future__ import annotations

import time

import numpy as np
import pytest
import torch

import jostle
from jostle.widgets import Explorer
from jostle.widgets._wire import from_wire

from .conftest import tiny_ensemble


@pytest.fixture
def explorer(ens, moons):
    ex = Explorer(ens, moons, budget=0.2, steps=8, grid=16, boundaries=3)
    assert ex.wait(60)
    yield ex
    ex.close()


def test_first_view_matches_predict_and_travels_as_binary(explorer, ens, moons):
    view = explorer.result
    assert view is not None and explorer.status[0] == "idle"
    expected = ens.predict(moons.x_test[:1])
    np.testing.assert_allclose(view.before.probs, expected.probs[0].numpy(), rtol=1e-6)
    state = explorer._map.get_state()
    assert isinstance(state["background"]["buffer"], memoryview)  # binary, not a JSON list
    assert state["background"]["shape"] == [16, 16, 2]
    np.testing.assert_allclose(from_wire(state["background"]), view.grid.probs)
    np.testing.assert_allclose(from_wire(state["train_points"]), moons.x_train.numpy())


def test_picking_a_point_from_the_front_end_updates_the_view(explorer, ens):
    explorer._map.set_state({"point": [0.25, 0.75]})  # what a click on the canvas sends
    assert explorer.wait(60)
    assert explorer.point == [0.25, 0.75]
    view = explorer.result
    assert view.state.point == (0.25, 0.75)
    np.testing.assert_allclose(view.before.probs, ens.predict(torch.tensor([[0.25, 0.75]])).probs[0].numpy(),
                               rtol=1e-6)
    assert explorer._map.ball_centre == [0.25, 0.75]


def test_code_and_front_end_drive_the_same_traits(explorer):
    explorer.set_state({"budget": 0.3, "samples": 2, "layer": "entropy"})
    assert explorer.wait(60)
    assert explorer._controls.budget == 0.3 and explorer._controls.samples == 2
    assert explorer._map.layer == "entropy"
    view = explorer.result
    assert (view.state.budget, view.state.samples, view.grid.layer) == (0.3, 2, "entropy")
    assert explorer._map.layer_shown == "entropy" and explorer._map.ball_budget == 0.3
    explorer._controls.set_state({"budget": 0.05})  # slider moved in the page
    assert explorer.wait(60) and explorer.budget == 0.05 and explorer.result.state.budget == 0.05


@pytest.mark.parametrize("name, bad, message", [
    ("point", [float("nan"), 0.0], "point must hold only finite floats"),
    ("point", [None, 0.0], "point must be a sequence of finite floats"),
    ("budget", -0.5, "budget must be a finite float >= 0; got -0.5"),
    ("samples", 0, r"samples must be an integer in [1, 6]; got 0"),
    ("samples", 7, r"samples must be an integer in [1, 6]; got 7"),
    ("method", "laser", "method must be one of"),
])
def test_bad_values_show_in_the_status_and_the_widget_keeps_working(explorer, name, bad, message):
    before = getattr(explorer, name)
    explorer.set_state({name: bad})
    assert explorer.wait(60)
    state, text = explorer.status
    assert state == "error" and message in text
    assert getattr(explorer, name) == before  # the last good value stays
    good = {"point": [0.1, 0.1], "budget": 0.15, "samples": 3, "method": "fgsm"}[name]
    explorer.set_state({name: good})
    assert explorer.wait(60)
    assert explorer.status[0] == "idle"
    assert getattr(explorer.result.state, name) == (tuple(good) if name == "point" else good)


def test_a_rejected_slider_value_snaps_the_slider_back(explorer):
    explorer._controls.set_state({"samples": 99})
    assert explorer.wait(60)
    assert explorer._controls.samples == explorer.samples == 6
    assert "samples must be an integer in [1, 6]; got 99" in explorer.status[1]


def test_a_storm_of_budget_changes_runs_a_few_computations_and_ends_on_the_last(explorer):
    runs_before = explorer.worker.runs
    started = time.perf_counter()
    for k in range(200):
        explorer.set_state({"budget": 0.001 * (k + 1)})
    assert time.perf_counter() - started < 2.0
    assert explorer.wait(60)
    assert explorer.worker.runs - runs_before <= 10
    assert explorer.budget == pytest.approx(0.2)
    assert explorer.result.state.budget == pytest.approx(0.2)
    assert explorer._map.ball_budget == pytest.approx(0.2)
    assert explorer.worker.delivery_failures == []


def test_a_drag_from_code_and_page_while_views_apply_ends_on_the_last_point(explorer):
    # The main thread mirrors points into the map while the worker writes view traits on it.
    for k in range(60):
        point = [-1.0 + 0.03 * k, 0.5]
        if k % 2:
            explorer._map.set_state({"point": point})
        else:
            explorer.point = point
    assert explorer.wait(60)
    assert explorer.result.state.point == pytest.approx((-1.0 + 0.03 * 59, 0.5))
    assert explorer._map.point == pytest.approx([-1.0 + 0.03 * 59, 0.5])
    assert explorer._map.ball_centre == pytest.approx([-1.0 + 0.03 * 59, 0.5])
    assert explorer.worker.delivery_failures == [] and explorer.status[0] == "idle"


def test_a_budget_change_does_not_resend_the_background(explorer):
    sent = explorer._map.background
    explorer.budget = 0.33
    assert explorer.wait(60)
    assert explorer._map.background is sent
    assert "grid_prediction" not in explorer.result.recomputed
    explorer.samples = 3
    assert explorer.wait(60)
    assert explorer._map.background is not sent and "grid_prediction" in explorer.result.recomputed


def test_html_looking_class_names_reach_the_front_end_as_plain_text(moons):
    name = "<img src=x onerror=alert(1)>"
    data = jostle.datasets.from_arrays(moons.x_train, moons.y_train, moons.x_test, moons.y_test,
                                       classes=[name, "b&amp;"], bounds=moons.bounds)
    ens = tiny_ensemble(members=3, class_names=[name, "b&amp;"])
    ex = Explorer(ens, data, grid=8, steps=2)
    try:
        assert ex.wait(60)
        assert ex._map.get_state()["classes"] == [name, "b&amp;"]  # unchanged text, not escaped or parsed
        assert ex.result.classes == [name, "b&amp;"]
        labels = [mark for mark in _figures(ex) if mark.has_trait("tick_labels")]
        ticks = [text for axis in labels for text in (axis.tick_labels or {}).values()]
        assert name[:11] + "\u2026" in ticks and "b&amp;" in ticks  # shortened, still the raw text
    finally:
        ex.close()


def test_two_explorers_linked_by_traitlets_share_point_and_budget(ens, moons):
    import traitlets

    a = Explorer(ens, moons, grid=8, steps=2)
    b = Explorer(tiny_ensemble(members=2, seed=1), moons, grid=8, steps=2)
    try:
        traitlets.link((a, "point"), (b, "point"))
        traitlets.link((a, "budget"), (b, "budget"))
        a._map.set_state({"point": [0.5, 0.0]})
        a.budget = 0.07
        assert a.wait(60) and b.wait(60)
        assert b.result.state.point == (0.5, 0.0) and b.result.state.budget == 0.07
    finally:
        a.close()
        b.close()


def test_explorer_refuses_data_that_is_not_two_dimensional(ens):
    digits = jostle.datasets.digits()
    with pytest.raises(ValueError, match="data must have 2 features for Explorer; got 64"):
        Explorer(ens, digits)


def test_attack_view_matches_jostle_attack_with_the_same_arguments(explorer, ens):
    explorer.set_state({"point": [0.2, 0.4], "budget": 0.25, "method": "pgd", "norm": "2", "samples": 4})
    assert explorer.wait(60)
    view = explorer.result
    adv = jostle.attack(ens, torch.tensor([[0.2, 0.4]]), y=torch.tensor([view.label]), method="pgd", eps=0.25,
                        norm="2", steps=8, samples=4, objective="expected_loss", seed=0)
    np.testing.assert_allclose(view.attack.path, adv.path[:, 0].numpy(), atol=1e-6)
    np.testing.assert_allclose(from_wire(explorer._map.path), adv.path[:, 0].numpy(), atol=1e-6)
    assert explorer._map.success == bool(adv.success[0])


def _figures(explorer):
    import bqplot

    found, stack = [], [explorer]
    while stack:
        node = stack.pop()
        if isinstance(node, bqplot.Figure):
            found.extend(node.axes)
        stack.extend(getattr(node, "children", ()))
    return found


def test_settings_the_attack_refuses_show_in_the_status_while_other_panels_update(explorer, ens):
    explorer.set_state({"method": "cw", "norm": "inf"})
    assert explorer.wait(60)
    state, text = explorer.status
    assert state == "error" and "norm must be one of ['2'] for method 'cw'; got 'inf'" in text
    explorer._map.set_state({"point": [-0.3, 0.6]})
    assert explorer.wait(60)
    np.testing.assert_allclose(explorer.result.before.probs,
                               ens.predict(torch.tensor([[-0.3, 0.6]])).probs[0].numpy(), rtol=1e-6)
    assert explorer.result.attack is None and explorer.status[0] == "error"
    explorer.norm = "2"
    assert explorer.wait(60)
    # C&W ascends only the margin: the explorer's objective must follow
    assert "objective must be one of ['margin'] for method 'cw'; got 'expected_loss'" in explorer.status[1]
    explorer.objective = "margin"
    assert explorer.wait(60)
    assert explorer.status[0] == "idle" and explorer.result.attack is not None


@pytest.mark.parametrize("kwargs, message", [
    ({"budget": -1.0}, r"budget must be a finite float >= 0; got -1"),
    ({"samples": 0}, r"samples must be an integer in \[1, 6\]; got 0"),
    ({"method": "laser"}, r"method must be one of"),
    ({"point": [0.0]}, r"point must have 2 coordinates; got 1"),
    ({"grid": -3}, r"grid must be an integer in \[0, 512\]; got -3"),
    ({"layer": "heat"}, r"layer must be one of 'predictive', 'epistemic', 'entropy', 'certified'; got 'heat'"),
])
def test_constructor_arguments_are_checked_and_raise(ens, moons, kwargs, message):
    with pytest.raises(ValueError, match=message):
        Explorer(ens, moons, **kwargs)


def test_constructor_refuses_something_that_is_not_an_ensemble(moons):
    with pytest.raises(ValueError, match="ens must be a jostle.Ensemble; got list"):
        Explorer([1, 2], moons)
