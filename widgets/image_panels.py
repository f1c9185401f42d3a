"""Original, perturbation (diverging scale) and attacked image, side by side."""
from __future__ import annotations

import anywidget
import traitlets as t

from ._assets import asset_path, canvas_module
from ._wire import empty_wire


class ImagePanels(anywidget.AnyWidget):
    """Three canvases; captions are plain text written by the kernel."""

    _esm = canvas_module("image_panels.js")
    _css = asset_path("theme.css")

    view_revision = t.Int(0, help="number of views the kernel has sent").tag(sync=True)
    original = t.Dict(empty_wire(None), help="the chosen image, float32 (H, W) or (3, H, W)").tag(sync=True)
    perturbation = t.Dict(empty_wire(None), help="attacked - original, (H, W) or (3, H, W)").tag(sync=True)
    attacked = t.Dict(empty_wire(None), help="the attacked image, float32 (H, W) or (3, H, W)").tag(sync=True)
    value_range = t.List(t.Float(), [0.0, 1.0], help="pixel values drawn as lightest and darkest").tag(sync=True)
    max_abs = t.Float(
        0.0, help="largest |perturbation|; the diverging scale spans +-max(max_abs, budget)"
    ).tag(sync=True)
    scale = t.Float(0.1, help="half-width of the diverging colour scale").tag(sync=True)
    captions = t.List(t.Unicode(), ["original", "perturbation", "attacked"], help="plain-text captions").tag(sync=True)
