"""The image explorer: choose a test image, attack it, see the perturbation and the predictive."""
from __future__ import annotations

from typing import Any

import ipywidgets as w
import numpy as np
import traitlets as t

import jostle.live.engine as live
from jostle.common.checks import check_int
from jostle.live.certified_parts import CAUTION as CERTIFICATE_CAUTION
from jostle.live.certified_parts import default_certificate
from jostle.posterior.ensemble import Ensemble

from . import _charts
from ._gradient_strip_part import GradientStripPart
from ._live_box import LiveBox
from ._wire import empty_wire, to_wire
from .image_panels import ImagePanels
from .image_strip import ImageStrip


class ImageExplorer(GradientStripPart, LiveBox):
    """Linked live views of a posterior ensemble on image data (e.g. the 8x8 digits).

    Parameters
    ----------
    ens : jostle.Ensemble
        A classifier of flattened images, ``data.n_features`` inputs.
    data : jostle.Dataset
        Needs ``data.image_shape``; the first ``strip`` test images are offered.
    index : int
        Position of the starting image in the strip.
    budget, samples, method, norm, steps, objective, seed
        Attack settings, as in :class:`Explorer`.
    strip : int
        How many test images the strip shows.
    certificate : str
        Bound method of the members-certified-at-the-budget read-out: ``auto`` (the default:
        ``crown`` for networks without convolutions, ``ibp`` for convolutional ones, see
        :func:`jostle.live.certified_parts.default_certificate`), ``crown`` (tightest), ``ibp``
        (looser, much cheaper on convolutional networks) or ``off``. It is recomputed at every
        budget after the panels and charts are drawn (the line says "computing" meanwhile):
        CROWN on ``jostle.cnn((1, 28, 28), 10)`` took about 20 s per member on 2 cores.
    """

    index = t.Int(0, help="position in the strip of the chosen test image").tag(sync=True)
    perturbation_view = t.Unicode(
        "channels", help="colour perturbation drawn per channel ('channels') or as the norm over channels ('magnitude')"
    ).tag(sync=True)

    def __init__(self, ens: Any, data: Any, index: int = 0, budget: float = 0.1, samples: int | None = None,
                 method: str = "pgd", norm: str = "inf", steps: int = 40, objective: str = "expected_loss",
                 strip: int = 24, seed: int = 0, certificate: str = "auto", **kwargs: Any):
        shape = _image_shape(data.image_shape)
        count = check_int("strip", strip, low=1)
        self._images = data.x_test[: min(count, data.x_test.shape[0])].numpy().astype(np.float64)
        self._shape = shape
        lo, hi = (np.asarray(b, dtype=float) for b in data.bounds)
        self._bounds = (lo.tolist(), hi.tolist())
        self._value_range = [float(lo.min()), float(hi.max())]
        self._classes = [str(c) for c in data.classes]
        index = check_int("index", index, low=0, high=self._images.shape[0] - 1)
        budget_max = round(0.5 * (self._value_range[1] - self._value_range[0]), 3)
        if certificate == "auto" and isinstance(ens, Ensemble):
            certificate = default_certificate(ens)
        self._setup_live(ens, {"budget": budget, "samples": samples, "method": method, "norm": norm, "steps": steps,
                               "objective": objective, "seed": seed, "certificate": certificate},
                         budget_max=budget_max)
        # no path chart here, so no predictive along the attack path
        self._fixed = {"grid": 0, "boundaries": 0, "seed": seed, "radius": False, "certificate": certificate,
                       "path_probs": False}
        self._panels_first = True
        self._drawn = None
        truth = data.y_test[: self._images.shape[0]].tolist()
        self._strip = ImageStrip(images=to_wire(self._images.reshape((-1,) + self._shape)),
                                 captions=[f"test image {k}: class {self._classes[y]}" for k, y in enumerate(truth)],
                                 value_range=self._value_range)
        self._panels = ImagePanels(value_range=self._value_range)
        predictive, self._draw_predictive = _charts.predictive_chart()
        fade, self._draw_fade = _charts.fade_chart()
        self._certified_text = _charts.caption("certificate: computing")
        self._certified_text.add_class("jostle-tid-certified-text")
        certified_caution = _charts.caption(CERTIFICATE_CAUTION)
        certified_caution.add_class("jostle-tid-certified-caution")
        attack = [self._controls, self._certified_text, certified_caution, fade, _charts.caption(_charts.FADE_CAPTION)]
        gradients = self._setup_gradient_strip(data.image_shape)
        self._view_choice = w.Dropdown(options=list(PERTURBATION_VIEWS), value="channels",
                                       description="perturbation", style={"description_width": "initial"})
        self._view_choice.add_class("jostle-tid-perturbation-view")
        inputs = w.VBox([self._panels, self._view_choice] if len(shape) == 3 else [self._panels])
        children = _layout(data, ens, self._strip, inputs, predictive, attack, self._status)
        super().__init__(children=children[:-1] + [gradients, children[-1]], **kwargs)
        self.add_class("jostle-root")
        for name in ("jostle-image-explorer", "jostle-tag-scope", "jostle-tid-image-explorer"):
            self.add_class(name)
        with self.hold_trait_notifications():
            self.index, self.budget, self.method, self.norm = index, budget, method, norm
            self.samples = len(ens) if samples is None else samples
            self.steps, self.objective = steps, objective
        self._strip.selected = self.index
        w.link((self, "perturbation_view"), (self._view_choice, "value"))
        self._strip.observe(self._from_strip, names=["selected"])
        self._start_live()

    @t.validate("index")
    def _validate_index(self, proposal: Any) -> Any:
        value = proposal.value
        if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value < self._images.shape[0]:
            self._worker.notify(ValueError(f"index must be an integer in [0, {self._images.shape[0] - 1}]; "
                                           f"got {value!r}"))
            return self._accepted.get("index", 0)
        self._accepted["index"] = value
        return value

    @t.validate("perturbation_view")
    def _validate_perturbation_view(self, proposal: Any) -> Any:
        if proposal.value not in PERTURBATION_VIEWS:
            self._worker.notify(ValueError(f"perturbation_view must be one of {', '.join(PERTURBATION_VIEWS)}; "
                                           f"got {proposal.value!r}"))
            return self._accepted.get("perturbation_view", "channels")
        self._accepted["perturbation_view"] = proposal.value
        return proposal.value

    @t.observe("perturbation_view")
    def _on_perturbation_view(self, change: Any) -> None:
        if change.old != change.new:
            self._request()

    @t.observe("index")
    def _on_index(self, change: Any) -> None:
        if change.old == change.new:  # a rejected value, see LiveBox._on_control
            return
        self._mirror(self._strip, "selected", self.index)
        self._request()

    def close(self) -> None:
        for child in ("_strip", "_panels", "_view_choice"):
            if hasattr(self, child):
                getattr(self, child).close()
        super().close()

    def _from_strip(self, change: Any) -> None:
        if not self._syncing:
            self.index = change.new
            if self.index != change.new:
                self._strip.selected = self.index

    def _state(self) -> live.ExplorerState:
        return live.ExplorerState(point=tuple(self._images[self.index].tolist()), budget=self.budget,
                                  samples=self.samples, method=self.method, norm=self.norm, steps=self.steps,
                                  objective=self.objective, **self._fixed)

    def _apply(self, view: live.ViewData) -> None:
        drawn = (view.state, id(view.attack), id(view.before), self.perturbation_view)
        if drawn != self._drawn:  # else the same view with its certificate, drawn already
            self._draw(view)
            self._drawn = drawn
        certificate = view.budget_certificate
        if certificate is not None:
            self._certified_text.value = certificate.words
        elif view.state.certificate == "off":
            self._certified_text.value = "certificate: off"
        elif view is self._early:
            self._certified_text.value = "certificate: computing"
        else:
            self._certified_text.value = "certificate: unavailable for this network (see the status line)"

    def _draw(self, view: live.ViewData) -> None:
        original = np.asarray(view.state.point).reshape(self._shape)
        names = view.classes
        first = f"original: {names[view.label]} ({view.before.probs[view.label]:.2f})"
        with self._panels.hold_sync():
            self._panels.original = to_wire(original)
            self._panels.view_revision += 1
            if view.attack is None:
                self._panels.perturbation = self._panels.attacked = empty_wire(None)
                self._panels.captions = [first, "perturbation: attacks unavailable", "attacked: -"]
            else:
                attacked = view.attack.x_adv.reshape(self._shape)
                delta = attacked - original
                shown = perturbation_picture(delta, self.perturbation_view)
                top = int(np.argmax(view.after.probs))
                self._panels.perturbation, self._panels.attacked = to_wire(shown), to_wire(attacked)
                self._panels.max_abs = float(np.abs(shown).max())
                self._panels.scale = max(float(np.abs(shown).max()), view.state.budget, 1e-6)
                verdict = "flipped" if view.attack.success else "held"
                self._panels.captions = [first, f"perturbation (max |delta| {np.abs(delta).max():.3f})",
                                         f"attacked: {names[top]} ({view.after.probs[top]:.2f}), {verdict}"]
        self._draw_predictive(view)
        self._draw_fade(view)

    # ---------------------------------------------------------------- sharing
    def report(self, path: Any, title: str | None = None, timeout: float = 60.0) -> Any:
        """Write the current view as one self-contained HTML file (see :meth:`Explorer.report`):
        the original, perturbation and attacked images as inline PNG, the predictive and
        fading charts as SVG, settings, provenance, cautions and the embedded state."""
        from . import report as _report

        return _report.explorers_report([self], ["image explorer"], path, title or "jostle image explorer report",
                                        "image_explorer", timeout)

    def figure(self, name: str, path: Any, timeout: float = 60.0) -> Any:
        """Write one view (``original``, ``perturbation``, ``attacked``, ``predictive``, ``fade``)
        as ``.svg`` or ``.png``."""
        from . import report as _report

        return _report.figure(self, name, path, timeout)

    @classmethod
    def from_report(cls, path: Any, ens: Any, data: Any, **kwargs: Any) -> ImageExplorer:
        """An ImageExplorer restored to a report's settings; refuses another posterior
        (sha256 of the parameters) or data whose chosen test image differs."""
        from . import report as _report

        entry = _report.entries_of(path, ("image",), ("image_explorer", "sweep_explorer"))[0]
        _report.check_same_posterior(ens, entry, path)
        _report.check_same_image(data, entry, path)
        return cls(ens, data, **{**_report.explorer_settings(entry), **kwargs})


PERTURBATION_VIEWS = ("channels", "magnitude")


def _image_shape(image_shape: Any) -> tuple:
    """(H, W) for greyscale, (3, H, W) for colour; anything else is refused."""
    shape = tuple(int(s) for s in image_shape or ())
    if len(shape) == 3 and shape[0] == 1:
        shape = shape[1:]  # one greyscale channel
    if len(shape) == 2 or (len(shape) == 3 and shape[0] == 3):
        if min(shape) >= 1:
            return shape
    raise ValueError(f"data must have an image_shape (H, W), (1, H, W) or (3, H, W) for ImageExplorer; "
                     f"got {image_shape!r}")


def perturbation_picture(delta: np.ndarray, view: str) -> np.ndarray:
    """What the perturbation panel draws: ``delta`` itself (greyscale, or colour per channel,
    (3, H, W)), or for colour with ``view="magnitude"`` its Euclidean norm over channels, (H, W)."""
    if delta.ndim == 3 and view == "magnitude":
        return np.sqrt(np.sum(delta * delta, axis=0))
    return delta


def _layout(data: Any, ens: Any, strip: w.Widget, panels: w.Widget, predictive: w.Widget, attack: list,
            status: w.Widget) -> list:
    method = ens.meta.get("method", "posterior")
    title = w.Label(f"{data.name}: {method}, S = {len(ens)} posterior samples")
    title.add_class("jostle-column-title")
    columns = []
    for heading, children in (("1 - input", [panels]), ("2 - posterior predictive", [predictive]),
                              ("3 - attack", attack)):
        label = w.Label(heading)
        label.add_class("jostle-column-title")
        columns.append(w.VBox([label, *children], layout=w.Layout(flex="1 1 300px", min_width="260px",
                                                                    padding="0 6px")))
    row = w.HBox(columns, layout=w.Layout(flex_flow="row wrap", width="100%", align_items="flex-start"))
    return [title, strip, row, status]
