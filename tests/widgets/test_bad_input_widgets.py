"""Bad values set on every live control (as the page would, through set_state): each shows a
clear error in the status line, the last good value stays, and the next good change works."""
from __future__ import annotations

import math
import re

import pytest
import traitlets
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import jostle
from jostle.widgets import Comparison, Explorer, ImageExplorer, SweepExplorer

from .conftest import tiny_ensemble
from .test_sweep_explorer import store  # noqa: F401  (the stored sweep fixture)

FEW = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
NOT_FINITE = st.sampled_from([math.nan, math.inf, -math.inf])

BAD = {
    "budget": (st.one_of(NOT_FINITE, st.floats(max_value=-1e-9, allow_infinity=False), st.floats(min_value=3.5e38),
                         st.text(max_size=3), st.none(), st.booleans()),
               r"budget must (be a finite float >= 0|fit the ensemble's dtype float32)"),
    "samples": (st.one_of(st.integers(max_value=0), st.integers(min_value=4, max_value=10**30), st.floats(0.5, 2.5),
                          st.text(max_size=3), st.none()),
                r"samples must be (an integer in \[1, 3\]|an int)"),
    "steps": (st.one_of(st.integers(max_value=0), st.integers(min_value=10_001), st.floats(0.5, 9.5),
                        st.text(max_size=3)),
              r"steps must be an integer in \[1, 10000\]"),
    "method": (st.one_of(st.text(max_size=6).filter(lambda s: s not in jostle.attacks.run.attack_names()),
                         st.integers(), st.none()),
               r"method must be one of 'fgsm', 'pgd', 'cw', 'spsa', 'square'"),
    "norm": (st.one_of(st.sampled_from(["1", "l2", "INF", ""]), st.integers()), r"norm must be one of 'inf', '2'"),
    "objective": (st.one_of(st.sampled_from(["hinge", "loss", ""]), st.integers()), r"objective must be one of"),
    "layer": (st.sampled_from(["probs", "", "Entropy"]), r"layer must be one of 'predictive', 'epistemic', 'entropy'"),
    "point": (st.one_of(st.lists(st.floats(-1, 1), min_size=0, max_size=4).filter(lambda p: len(p) != 2),
                        st.tuples(NOT_FINITE, st.floats(-1, 1)).map(list), st.just([1e300, 0.0]),
                        st.integers(), st.text(min_size=1, max_size=3)),
              r"point must (have 2 coordinates|hold only finite floats"
              r"|be a sequence of finite floats|fit the ensemble)"),
}
GOOD = {"budget": [0.15, 0.25], "samples": [2, 3], "steps": [3, 4], "method": ["fgsm", "pgd"], "norm": ["2", "inf"],
        "objective": ["predictive", "expected_loss"], "layer": ["epistemic", "predictive"],
        "point": [[0.1, 0.2], [0.3, -0.1]]}


@pytest.fixture(scope="module")
def explorer(moons):
    ex = Explorer(tiny_ensemble(members=3, hidden=(8,)), moons, budget=0.1, steps=3, grid=8, boundaries=2,
                  method="fgsm")
    assert ex.wait(60)
    yield ex
    ex.close()


def _refused_then_recovers(widget, name, bad, message):
    before = getattr(widget, name)
    widget.set_state({name: bad})
    assert widget.wait(60)
    state, text = widget.status
    assert state == "error", (name, bad, text)
    assert re.search(message, text), text
    assert getattr(widget, name) == before  # the last good value stays
    good = next(v for v in GOOD[name] if v != before)
    widget.set_state({name: good})
    assert widget.wait(60)
    assert widget.status[0] == "idle", widget.status
    assert getattr(widget, name) == good
    shown = widget.result.state
    assert getattr(shown, name) == (tuple(good) if name == "point" else good)


@pytest.mark.parametrize("name", sorted(BAD))
def test_explorer_controls_refuse_bad_values_and_keep_working(explorer, name):
    strategy, message = BAD[name]  # method is fgsm, so both norms are valid

    @FEW
    @given(bad=strategy)
    def check(bad):
        _refused_then_recovers(explorer, name, bad, message)

    check()


def test_controls_view_sends_bad_values_and_snaps_back(explorer):
    before = explorer.budget
    explorer._controls.set_state({"budget": -1.0})  # the slider's own model, as the page would send
    assert explorer.wait(60)
    assert explorer.status[0] == "error" and "budget must be a finite float >= 0; got -1" in explorer.status[1]
    assert explorer.budget == before and explorer._controls.budget == before
    explorer._controls.set_state({"budget": before + 0.05})
    assert explorer.wait(60) and explorer.status[0] == "idle" and explorer.result.state.budget == before + 0.05


@pytest.fixture(scope="module")
def digits():
    return jostle.datasets.digits(seed=0)


def test_image_explorer_index_and_budget_refusals(digits):
    ens = tiny_ensemble(members=3, in_features=64, classes=10, hidden=(8,), class_names=digits.classes)
    ex = ImageExplorer(ens, digits, strip=4, steps=2, budget=0.1, method="fgsm")
    try:
        assert ex.wait(60)
        for bad in (-1, 4, 2.5, "a", None):
            ex.set_state({"index": bad})
            assert ex.wait(60)
            assert ex.status[0] == "error" and "index must be" in ex.status[1], ex.status
            assert ex.index == 0
        ex.set_state({"index": 2})
        assert ex.wait(60) and ex.status[0] == "idle" and ex.index == 2
        for bad in (math.nan, -0.1, "wide"):
            ex.set_state({"budget": bad})
            assert ex.wait(60) and ex.status[0] == "error" and "budget must be a finite float >= 0" in ex.status[1]
            assert ex.budget == 0.1
        ex.set_state({"budget": 0.2})
        assert ex.wait(60) and ex.status[0] == "idle" and ex.result.state.budget == 0.2
    finally:
        ex.close()


def test_comparison_refuses_bad_shared_values(moons):
    comparison = Comparison([tiny_ensemble(members=3, seed=1), tiny_ensemble(members=2, seed=2)], moons, steps=2,
                            grid=8, boundaries=1, method="fgsm")
    try:
        assert comparison.wait(60)
        with pytest.raises(traitlets.TraitError, match=r"samples must be an integer in \[1, 3\]; got 0"):
            comparison.samples = 0
        assert comparison.used_samples() == [3, 2]
        comparison.samples = 1
        assert comparison.wait(60) and comparison.used_samples() == [1, 1]
        first, second = comparison.explorers
        first.set_state({"budget": math.inf})  # a linked control: the refusal must not spread
        assert comparison.wait(60)
        assert first.status[0] == "error" and "budget must be a finite float >= 0; got inf" in first.status[1]
        assert first.budget == second.budget == 0.1
        first.set_state({"budget": 0.3})
        assert comparison.wait(60)
        assert [e.result.state.budget for e in comparison.explorers] == [0.3, 0.3]
        assert all(e.status[0] == "idle" for e in comparison.explorers)
    finally:
        comparison.close()


@FEW
@given(name=st.sampled_from(["budget", "attack", "measure"]),
       bad=st.one_of(st.floats(-1e9, 1e9).filter(lambda b: b not in (0.1, 0.2)), st.text(max_size=4)))
def test_sweep_explorer_view_refusals_snap_back(store, name, bad):  # noqa: F811
    widget = SweepExplorer(store)
    try:
        before = getattr(widget, name)
        try:
            setattr(widget.chart, name, bad)  # as if the page sent it
        except traitlets.TraitError as err:  # the chart trait's own type check
            assert name in str(err)
        else:
            assert getattr(widget, name) == before and getattr(widget.chart, name) == before
            assert f"{name} must be one of" in widget.chart.note
        widget.chart.measure = "unflipped"
        assert widget.measure == "unflipped"
    finally:
        widget.close()
