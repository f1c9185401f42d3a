"""The harness itself: stock ipywidgets and a bare anywidget render, and clicks round-trip.

No jostle widget is involved, so a failure here points at the browser, server or widget
stack rather than at jostle's views.
"""
from __future__ import annotations

import pytest

from .harness import open_and_run, open_voila, screenshot, wait_for, wait_until, write_notebook

pytestmark = [pytest.mark.browser, pytest.mark.slow]

# The view never changes `count` itself: it sends a message, the kernel adds one and the
# new value syncs back. So the number shown proves the kernel received the click.
SMOKE_CELLS = [
    ("markdown", "# harness smoke test"),
    '''import anywidget, traitlets, ipywidgets as widgets

class Tally(anywidget.AnyWidget):
    _esm = """
    export default {
      render({ model, el }) {
        const button = document.createElement("button");
        button.dataset.testid = "smoke-tally";
        const show = () => {
          button.textContent = "clicks " + model.get("count");
          button.dataset.count = model.get("count");
        };
        button.addEventListener("click", () => model.send({ kind: "bump" }));
        model.on("change:count", show);
        show();
        el.appendChild(button);
        return () => model.off("change:count", show);
      }
    };
    """
    count = traitlets.Int(0, help="clicks the kernel has counted").tag(sync=True)

    def __init__(self, **kwargs):
        super().__init__(**kwargs)
        self.on_msg(self._on_message)

    def _on_message(self, widget, content, buffers):
        if content.get("kind") == "bump":
            self.count += 1

tally = Tally()
tally''',
    '''slider = widgets.IntSlider(value=3, min=0, max=10, description="n")
square = widgets.Label(value="square 9")
slider.add_class("smoke-slider")
square.add_class("smoke-square")
slider.observe(lambda change: setattr(square, "value", f"square {change['new'] ** 2}"), names="value")
widgets.VBox([slider, square])''',
]


@pytest.fixture(scope="module")
def smoke_notebook(lab_server):
    return write_notebook(lab_server.root / "smoke.ipynb", SMOKE_CELLS)


def _check_round_trips(page) -> None:
    tally = wait_for(page, "smoke-tally")
    assert tally.get_attribute("data-count") == "0"
    for expected in ("1", "2"):
        tally.click()
        wait_until(page, "n => { const b = document.querySelector('[data-testid=smoke-tally]');"
                         " return b && b.dataset.count === n; }",
                   arg=expected, timeout=20, what=f"the kernel's count {expected} to reach the page")
    assert tally.inner_text() == "clicks 2"

    handle = page.locator(".smoke-slider .slider-container .noUi-handle, .smoke-slider .ui-slider-handle").first
    handle.wait_for(timeout=20_000)
    handle.focus()
    page.keyboard.press("ArrowRight")
    page.keyboard.press("ArrowRight")
    # 3 -> 5 in the browser; the kernel's observer squares it and sends the label back.
    wait_until(page, "() => { const l = document.querySelector('.smoke-square');"
                     " return l && l.textContent.includes('square 25'); }",
               timeout=20, what="the kernel's reply to the slider move (square 25)")


def test_lab_widgets_render_and_round_trip(page, lab_server, smoke_notebook):
    open_and_run(page, lab_server, smoke_notebook.name)
    _check_round_trips(page)
    screenshot(page, "smoke-lab")


def test_voila_widgets_render_and_round_trip(page, voila_server, smoke_notebook):
    voila = voila_server(smoke_notebook)
    open_voila(page, voila)
    _check_round_trips(page)
    # Voila hides code: the class definition must not appear on the page.
    assert "class Tally" not in page.content()
    screenshot(page, "smoke-voila")
