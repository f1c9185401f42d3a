"""Two explorers tied together with ipywidgets.jslink, in a real JupyterLab page.

The Explorer docstring promises that its control traits can be linked in the browser
(``ipywidgets.jslink``, the front-end link of ipywidgets): moving one explorer's budget
slider must move the other's, and the other must recompute its attack for that budget.
"""
from __future__ import annotations

import pytest

from .explorer_page import click_map, set_range, snapshot, wait_for_explorer, wait_for_update
from .harness import lab_notebook, screenshot

pytestmark = [pytest.mark.browser, pytest.mark.slow]

LINKED_CELLS = [
    ("markdown", "# linked explorers under test"),
    '''import ipywidgets as w
import jostle
from jostle.widgets import Explorer

data = jostle.datasets.moons(n_train=80, n_test=20, noise=0.2, seed=1)
bayes = jostle.fit_deep_ensemble(jostle.mlp(2, 2, hidden=(12,)), data, members=4, epochs=30,
                                 batch_size=40, lr=0.03, seed=1, progress=False)
point = jostle.fit_map(jostle.mlp(2, 2, hidden=(12,)), data, epochs=30, batch_size=40, lr=0.03, seed=2,
                       progress=False)
left = Explorer(bayes, data, grid=16, steps=10)
right = Explorer(point, data, grid=16, steps=10)
left.add_class("jostle-left")
right.add_class("jostle-right")
links = [w.jslink((left, "budget"), (right, "budget")), w.jslink((left, "point"), (right, "point"))]
w.HBox([left, right])''',
]

LEFT, RIGHT = ".jostle-left", ".jostle-right"


@pytest.fixture(scope="module")
def linked_page(chromium_browser, lab_server):
    with lab_notebook(chromium_browser, lab_server, "linked.ipynb", LINKED_CELLS, viewport=(1800, 1100)) as opened:
        wait_for_explorer(opened[0], scope=LEFT)
        wait_for_explorer(opened[0], scope=RIGHT)
        yield opened


@pytest.mark.parametrize("source, other, budget", [(LEFT, RIGHT, 0.35), (RIGHT, LEFT, 0.2)])
def test_a_budget_moved_in_one_explorer_moves_and_recomputes_the_other(linked_page, source, other, budget):
    page, errors = linked_page
    before = snapshot(page, other)
    set_range(page, "budget-slider", budget, scope=source)
    after = wait_for_update(page, before, ["budget", "path"], scope=other,
                            what=f"the linked explorer {other} to take budget {budget} and redraw its path")
    assert float(after["budget"]) == pytest.approx(budget, abs=0.01)  # the range input snaps to its step
    assert after["ballRadiusPx"] > 0
    assert snapshot(page, source)["budget"] == after["budget"]
    screenshot(page, "linked-explorers")
    errors.check()


def test_a_point_picked_on_one_map_is_picked_on_the_other(linked_page):
    page, errors = linked_page
    before = snapshot(page, RIGHT)
    click_map(page, 0.3, 0.7, scope=LEFT)
    after = wait_for_update(page, before, ["point", "predictive"], scope=RIGHT,
                            what="the linked explorer to move to the point picked on the other map")
    assert after["point"] == snapshot(page, LEFT)["point"]
    errors.check()
