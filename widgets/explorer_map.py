"""The input map: training points, background layer, member boundaries, eps-ball, attack path."""
from __future__ import annotations

import anywidget
import traitlets as t

from ._assets import asset_path, canvas_module
from ._wire import empty_wire

LAYER_LABELS = {
    "predictive": "posterior predictive",
    "epistemic": "epistemic (mutual information)",
    "entropy": "total entropy",
    "certified": "certified radius (predictive)",
}


class ExplorerMap(anywidget.AnyWidget):
    """Canvas view of a 2-D input space; click, drag or arrow keys pick the input.

    The kernel writes the view traits (arrays travel as binary buffers); the front end
    writes only ``point`` and ``layer``.
    """

    _esm = canvas_module("explorer_map.js", "_radius_layer.js")
    _css = asset_path("theme.css")

    point = t.List(
        t.Float(), [0.0, 0.0], help="picked input (x, y) in data units; set by click, drag or arrow keys"
    ).tag(sync=True)
    layer = t.Unicode(
        "predictive", help="background layer shown: predictive, epistemic, entropy or certified"
    ).tag(sync=True)
    layer_labels = t.Dict(LAYER_LABELS, help="readable name of each background layer").tag(sync=True)
    bounds = t.List(t.Float(), [-1.0, 1.0, -1.0, 1.0], help="input box [x_lo, x_hi, y_lo, y_hi] drawn").tag(sync=True)
    classes = t.List(t.Unicode(), [], help="class names, shown as plain text in the legend").tag(sync=True)
    train_points = t.Dict(empty_wire(2), help="training inputs, float32 (n, 2)").tag(sync=True)
    train_labels = t.Dict(empty_wire(None, "uint8"), help="training labels, uint8 (n,)").tag(sync=True)
    background = t.Dict(
        empty_wire(None), help="grid predictive probabilities, float32 (n_y, n_x, n_classes)"
    ).tag(sync=True)
    layer_values = t.Dict(empty_wire(None), help="chosen layer on the grid, float32 (n_y, n_x)").tag(sync=True)
    layer_shown = t.Unicode("predictive", help="layer the background arrays hold").tag(sync=True)
    layer_max = t.Float(1.0, help="top of the layer's colour scale").tag(sync=True)
    segments = t.Dict(empty_wire(4), help="member decision boundaries, float32 (n, 4) as x0, y0, x1, y1").tag(sync=True)
    members_drawn = t.Int(0, help="how many members' boundaries the segments trace").tag(sync=True)
    path = t.Dict(empty_wire(2), help="attack path from the input, float32 (steps + 1, 2)").tag(sync=True)
    ball_budget = t.Float(0.0, help="eps of the drawn eps-ball (the computed view's budget)").tag(sync=True)
    ball_norm = t.Unicode("inf", help="norm of the drawn eps-ball: inf (square) or 2 (disc)").tag(sync=True)
    ball_centre = t.List(
        t.Float(), [], help="centre of the drawn eps-ball and path (the computed input)"
    ).tag(sync=True)
    success = t.Bool(False, help="whether the drawn attack flips the whole ensemble's label").tag(sync=True)
    view_revision = t.Int(0, help="number of views the kernel has sent").tag(sync=True)
    predicted = t.Unicode(
        "", help="predicted class at ball_centre with its probability, as text (the map's ARIA description)"
    ).tag(sync=True)
    certified_radius = t.Float(-1.0, help="certified radius at the input, drawn as a ring (-1: none)").tag(sync=True)
    flip_budget = t.Float(
        -1.0, help="smallest budget the attack flipped at, a dotted ring (-1: none found)"
    ).tag(sync=True)
    radius_layer = t.Dict(
        empty_wire(None), help="certified radius of the predictive per grid cell, float32 (n_y, n_x)"
    ).tag(sync=True)
    radius_layer_max = t.Float(0.0, help="top of the certified-radius colour scale").tag(sync=True)
    radius_layer_note = t.Unicode("", help="resolution drawn so far, e.g. '16 x 16 of 64 x 64'").tag(sync=True)
