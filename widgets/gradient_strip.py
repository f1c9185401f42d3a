"""A row of expected-gradient images, one per sample count S, each on its own scale."""
from __future__ import annotations

import anywidget
import traitlets as t

from ._assets import canvas_module, read_asset
from ._wire import empty_wire


class GradientStrip(anywidget.AnyWidget):
    """The expected loss gradient at one input for a few sample counts (drawn by ``js/gradient_strip.js``).

    Signed images use the diverging scale (blue negative, red positive, the surface colour at
    zero) from ``-scales[k]`` to ``scales[k]``; unsigned ones (magnitude over colour channels)
    run from the surface colour to red at ``scales[k]``.
    """

    _esm = canvas_module("gradient_strip.js")
    _css = read_asset("theme.css") + "\n" + read_asset("gradient_pictures.css")

    images = t.Dict(empty_wire(None), help="gradient images, float32 (K, height, width)").tag(sync=True)
    scales = t.List(t.Float(), [], help="each image's half-range: its largest |value|").tag(sync=True)
    signed = t.Bool(True, help="True: signed gradient, diverging scale; False: magnitude, one-hue scale").tag(sync=True)
    sample_counts = t.List(t.Int(), [], help="the sample count S of each image").tag(sync=True)
    norms = t.List(t.Float(), [], help="L-inf norm of each image's gradient (over every component)").tag(sync=True)
    captions = t.List(t.Unicode(), [], help="plain-text caption under each image").tag(sync=True)
    highlighted = t.Int(-1, help="position of the attacker's own sample count in the strip, or -1").tag(sync=True)
    note = t.Unicode("", help="plain-text line under the strip: what the colours mean").tag(sync=True)
