"""A strip of small images to choose one from (click, or Enter / Space on a focused image)."""
from __future__ import annotations

import anywidget
import traitlets as t

from ._assets import asset_path, canvas_module
from ._wire import empty_wire


class ImageStrip(anywidget.AnyWidget):
    """Thumbnails of test images; ``selected`` is the chosen one's position in the strip."""

    _esm = canvas_module("image_strip.js")
    _css = asset_path("theme.css")

    images = t.Dict(empty_wire(None), help="images, float32 (n, H, W) or colour (n, 3, H, W)").tag(sync=True)
    captions = t.List(t.Unicode(), [], help="one plain-text caption per image (its true class)").tag(sync=True)
    value_range = t.List(t.Float(), [0.0, 1.0], help="pixel values drawn as lightest and darkest").tag(sync=True)
    selected = t.Int(0, help="position of the chosen image in the strip").tag(sync=True)
