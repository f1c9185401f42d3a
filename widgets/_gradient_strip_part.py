"""The expected-gradient strip of :class:`ImageExplorer`, computed on the explorer's own worker.

A mixin placed ahead of :class:`LiveBox`: its ``_compute`` runs the live view and then, when
the image, the attacker's sample count or the seed changed, :func:`jostle.gradient_pictures`
at S = 1, 4, 16, 64, all and the attacker's own S; its ``_deliver`` draws the strip after
the other views, on the worker thread, under the same view lock.
"""
from __future__ import annotations

import time
from typing import Any

import ipywidgets as w
import numpy as np

import jostle.live.engine as live
from jostle.attacks.gradient_pictures import PICTURE_SAMPLES, gradient_pictures

from ._wire import to_wire
from .gradient_strip import GradientStrip

STRIP_PART = "gradient strip"


class GradientStripPart:
    """Mixin: the strip of expected loss gradients at the chosen input."""

    def _setup_gradient_strip(self, image_shape: tuple[int, ...]) -> w.Widget:
        """Call before ``super().__init__``; returns the section to place in the layout."""
        self._gradient_shape = tuple(int(s) for s in image_shape)
        self._gradient_key: tuple | None = None
        self._gradient_shown: tuple | None = None
        self._gradient_out: Any = None
        self._gradient_strip = GradientStrip()
        title = w.Label("expected loss gradient at this input, by samples averaged (S)")
        title.add_class("jostle-column-title")
        section = w.VBox([title, self._gradient_strip], layout=w.Layout(padding="4px 6px"))
        section.add_class("jostle-tid-gradient-section")
        return section

    def _compute(self, state: live.ExplorerState) -> live.ViewData:
        view = super()._compute(state)
        key = (state.point, view.state.samples, state.seed)
        if key != self._gradient_key:
            started = time.perf_counter()
            x = np.asarray(state.point, dtype=np.float64)[None]
            self._gradient_out = gradient_pictures(self._ens, x, [view.label], seed=state.seed,
                                                   samples=PICTURE_SAMPLES + (view.state.samples,))
            self._gradient_key = key
            view.recomputed = tuple(view.recomputed) + (STRIP_PART,)
            view.timings[STRIP_PART] = time.perf_counter() - started
        return view

    def _deliver(self, outcome: live.Outcome) -> None:
        super()._deliver(outcome)
        if outcome.error is None and outcome.result is not None and self._gradient_out is not None:
            with self._view_lock:
                self._draw_gradient_strip(outcome.result.state.samples)

    def _draw_gradient_strip(self, attacker_samples: int) -> None:
        if self._gradient_shown == self._gradient_key:
            return
        out = self._gradient_out
        strip = out.pictures(self._gradient_shape)
        counts = [int(c) for c in out.sample_counts]
        members = len(self._ens)
        captions = [f"S = {c}{' (all)' if c == members else ''}\nL-inf {out.linf[k, 0]:.3g}"
                    for k, c in enumerate(counts)]
        with self._gradient_strip.hold_sync():
            self._gradient_strip.images = to_wire(strip.images[:, 0])
            self._gradient_strip.scales = [float(s) for s in strip.scales[:, 0]]
            self._gradient_strip.signed = strip.signed
            self._gradient_strip.sample_counts = counts
            self._gradient_strip.norms = [float(v) for v in out.linf[:, 0]]
            self._gradient_strip.captions = captions
            self._gradient_strip.highlighted = counts.index(attacker_samples)
            self._gradient_strip.note = _note(strip.kind, members)
        self._gradient_shown = self._gradient_key

    def close(self) -> None:
        if hasattr(self, "_gradient_strip"):
            self._gradient_strip.close()
        super().close()


def _note(kind: str, members: int) -> str:
    colours = ("blue: the loss falls as the pixel value rises, red: it rises" if kind == "signed"
               else f"{kind}, darker red is larger")
    return (f"Each image on its own scale ({colours}). S counts members of {members} taken in one seeded "
            f"order, so each S holds the smaller ones; the framed image is the attacker's S.")
