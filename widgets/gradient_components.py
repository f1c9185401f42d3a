"""Every input component's expected gradient over a set of test inputs, at each sample count S."""
from __future__ import annotations

from typing import Any

import anywidget
import numpy as np
import traitlets as t

from jostle import Ensemble
from jostle.attacks.gradient_pictures import PICTURE_SAMPLES, dataset_gradients
from jostle.common.checks import check_int, check_seed

from ._assets import canvas_module, read_asset
from ._wire import empty_wire, to_wire


class GradientComponents(anywidget.AnyWidget):
    """The expected loss gradient of many test inputs, one row per sample count S.

    Each row holds a heat map (test inputs down, input components across, its own symmetric
    scale) and a summary: the mean |component| over the inputs, as an image when the data
    are images (all rows on one scale, so the rows show how the gradient shrinks with S).

    Parameters
    ----------
    ens : jostle.Ensemble
    data : jostle.Dataset
        Its test inputs are used, at their true labels.
    points : int
        How many test inputs, a seeded subset (:func:`jostle.dataset_gradients`).
    samples : sequence of int or None
        Sample counts S (None: every member), clipped to the ensemble's size.
    seed : int
        Picks the inputs and the member order.
    """

    _esm = canvas_module("gradient_components.js")
    _css = read_asset("theme.css") + "\n" + read_asset("gradient_pictures.css")

    heat = t.Dict(empty_wire(None), help="gradients, float32 (K, n_points, n_components)").tag(sync=True)
    heat_scales = t.List(t.Float(), [], help="each row's half-range: its largest |component|").tag(sync=True)
    summary = t.Dict(empty_wire(None), help="mean |component| over points, float32 (K, height, width)").tag(sync=True)
    summary_scale = t.Float(1.0, help="top of the summaries' shared scale").tag(sync=True)
    sample_counts = t.List(t.Int(), [], help="the sample count S of each row").tag(sync=True)
    component_means = t.List(t.Float(), [], help="mean |component| of each row over all of it").tag(sync=True)
    captions = t.List(t.Unicode(), [], help="plain-text caption of each row").tag(sync=True)
    note = t.Unicode("", help="plain-text line under the rows: what is drawn and how").tag(sync=True)

    def __init__(self, ens: Any, data: Any, points: int = 32, samples: Any = PICTURE_SAMPLES, seed: int = 0,
                 **kwargs: Any):
        if not isinstance(ens, Ensemble):
            raise ValueError(f"ens must be a jostle.Ensemble; got {type(ens).__name__}")
        check_int("points", points, low=1)
        check_seed(seed)
        super().__init__(**kwargs)
        self._out = dataset_gradients(ens, data, points=points, samples=samples, seed=seed)
        self._show(ens, data)

    @property
    def gradients(self) -> Any:
        """The :class:`jostle.GradientPictures` shown (``indices``: the test inputs used)."""
        return self._out

    def __repr__(self) -> str:
        points = int(self._out.labels.shape[0])
        return f"GradientComponents(points={points}, sample_counts={self.sample_counts})"

    def _show(self, ens: Ensemble, data: Any) -> None:
        out = self._out
        components = out.components
        shape = data.image_shape if data.image_shape else (1, 1, components.shape[2])
        summary = out.component_summary(shape)
        counts = [int(c) for c in out.sample_counts]
        scales = np.abs(components).reshape(len(counts), -1).max(axis=1)
        means = out.component_abs_mean.mean(axis=1)
        kind = out.pictures(shape).kind
        with self.hold_sync():
            self.heat = to_wire(components)
            self.heat_scales = [float(s) if s > 0 else 1.0 for s in scales]
            self.summary = to_wire(summary)
            self.summary_scale = float(summary.max()) if summary.max() > 0 else 1.0
            self.sample_counts = counts
            self.component_means = [float(m) for m in means]
            self.captions = [f"mean |component| {m:.3g}\nlargest |component| {s:.3g}\n"
                             f"median L-inf {np.median(out.linf[k]):.3g}" for k, (m, s) in
                             enumerate(zip(means, scales))]
            self.note = (f"{components.shape[1]} test inputs (seeded subset, true labels) down, "
                         f"{components.shape[2]} input components across; each heat map on its own scale "
                         f"(blue negative, red positive). Right: mean |component| over the inputs"
                         f"{', ' + kind if kind != 'signed' else ''}, one scale for every S "
                         f"(top {self.summary_scale:.3g}). S of {len(ens)} members, nested seeded subsets.")
