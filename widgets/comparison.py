"""Explorers of several posteriors side by side, sharing one input, budget and sample count."""
from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import ipywidgets as w
import traitlets

from jostle.common.checks import check_int

from . import _shown
from .explorer import Explorer

SHARED = ("point", "budget", "method", "norm", "steps", "objective", "layer")


class Comparison(w.VBox):
    """One :class:`Explorer` per ensemble, linked with ``traitlets.link``.

    Moving the input, the budget or the method in any column moves them in all. The
    attacker's sample count is one shared value, ``samples``, from 1 to the largest
    ensemble's size (its slider sits above the columns); each explorer attacks with
    ``min(samples, len(its ensemble))`` and says so beside its own slider ("1 of 1" for a
    deterministic net), whatever order the ensembles come in. Moving a column's own
    samples slider sets the shared value.

    Parameters
    ----------
    ensembles : sequence of jostle.Ensemble
    data : jostle.Dataset (2 features)
    labels : sequence of str, optional
        Column headings (plain text); default ``ens.meta["method"]`` or ``model k``.
    **explorer_kwargs
        Passed to every :class:`Explorer` (budget, steps, grid, ...); ``samples`` sets the
        shared count (default: the largest ensemble's size).
    """

    samples = traitlets.Int(1, help="attacker samples shared by all columns, 1..the largest ensemble's size")

    def __init__(self, ensembles: Sequence[Any], data: Any, labels: Sequence[str] | None = None,
                 **explorer_kwargs: Any):
        ensembles = list(ensembles)
        if len(ensembles) < 2:
            raise ValueError(f"ensembles must hold at least 2 posteriors to compare; got {len(ensembles)}")
        if labels is None:
            labels = [str(e.meta.get("method", f"model {k + 1}")) for k, e in enumerate(ensembles)]
        labels = [str(label) for label in labels]
        self._labels = labels
        if len(labels) != len(ensembles):
            raise ValueError(f"labels must name each of the {len(ensembles)} ensembles; got {len(labels)}")
        largest = max(len(e) for e in ensembles)
        shared = explorer_kwargs.pop("samples", None)
        shared = largest if shared is None else check_int("samples", shared, low=1, high=largest)
        self.explorers = [Explorer(e, data, samples=min(shared, len(e)), **explorer_kwargs) for e in ensembles]
        self._links = []
        first = self.explorers[0]
        for other in self.explorers[1:]:
            for name in SHARED:
                self._links.append(traitlets.link((first, name), (other, name)))
        self._largest, self._spreading = largest, False
        self.samples_control = w.IntSlider(value=shared, min=1, max=largest,
                                           description="attacker samples, all columns",
                                           style={"description_width": "initial"}, layout=w.Layout(width="420px"))
        self.samples_control.add_class("jostle-tid-comparison-samples")
        self._links.append(traitlets.link((self.samples_control, "value"), (self, "samples")))
        self.set_trait("samples", shared)
        self._spread_samples()
        self.observe(lambda change: self._spread_samples(), names="samples")
        for explorer in self.explorers:
            explorer.observe(self._from_column, names="samples")
        columns = []
        for label, explorer in zip(labels, self.explorers):
            heading = w.Label(label)
            heading.add_class("jostle-column-title")
            heading.add_class("jostle-tid-comparison-label")
            column = w.VBox([heading, explorer], layout=w.Layout(flex="1 1 480px", min_width="420px"))
            column.add_class("jostle-tid-comparison-column")
            columns.append(column)
        super().__init__([self.samples_control, w.HBox(columns, layout=w.Layout(flex_flow="row wrap", width="100%"))])
        _shown.remember(self)
        for name in ("jostle-root", "jostle-comparison", "jostle-tag-scope", "jostle-tid-comparison"):
            self.add_class(name)

    def wait(self, timeout: float = 30.0) -> bool:
        """Block until every explorer has shown its latest view; False on timeout."""
        return all(explorer.wait(timeout) for explorer in self.explorers)

    def radii(self) -> list:
        """Per column, the certified radius (lower bound) and the attack's flip budget (upper bound).

        Each item is the column's ``jostle.live.engine.RadiusView`` at the shared input (``radius``,
        ``flip``, ``words``), or None before its first view; each column also shows the words.
        """
        return [None if explorer.result is None else explorer.result.radius for explorer in self.explorers]

    def used_samples(self) -> list[int]:
        """Samples each column's attacker uses: ``min(samples, len(ensemble))``, in column order."""
        return [explorer.samples for explorer in self.explorers]

    @traitlets.validate("samples")
    def _check_samples(self, proposal: Any) -> int:
        try:
            return check_int("samples", proposal["value"], low=1, high=self._largest)
        except ValueError as err:
            raise traitlets.TraitError(str(err)) from None

    def _spread_samples(self) -> None:
        self._spreading = True
        try:
            for explorer in self.explorers:
                size = len(explorer._ens)
                explorer.samples = min(self.samples, size)
                explorer._controls.samples_note = f"{explorer.samples} of {size}"
        finally:
            self._spreading = False

    def _from_column(self, change: Any) -> None:
        # A column's own slider moved: its value becomes the shared one, unless that column
        # is only showing the shared value clipped to its size.
        if self._spreading or change.new == min(self.samples, len(change.owner._ens)):
            return
        self.samples = change.new

    def close(self) -> None:
        links, self._links = getattr(self, "_links", []), []
        for link in links:
            link.unlink()
        for explorer in getattr(self, "explorers", ()):
            explorer.close()
        super().close()

    # ---------------------------------------------------------------- sharing
    def report(self, path: Any, title: str | None = None, timeout: float = 60.0) -> Any:
        """Write every column's current view into one self-contained HTML file (see
        :meth:`Explorer.report`), one section per posterior under its column heading."""
        from . import report as _report

        return _report.explorers_report(self.explorers, self._labels, path, title or "jostle comparison report",
                                        "comparison", timeout)

    def figure(self, name: str, path: Any, column: int = 0, timeout: float = 60.0) -> Any:
        """Write one view of one column as ``.svg`` or ``.png`` (see :meth:`Explorer.figure`)."""
        column = check_int("column", column, low=0, high=len(self.explorers) - 1)
        return self.explorers[column].figure(name, path, timeout)

    @classmethod
    def from_report(cls, path: Any, ensembles: Sequence[Any], data: Any, **kwargs: Any) -> Comparison:
        """A Comparison restored to a report's shared settings; ``ensembles`` in the report's
        column order, each checked against its column's sha256."""
        from . import report as _report

        entries = _report.entries_of(path, ("explorer",), ("comparison",))
        ensembles = list(ensembles)
        if len(ensembles) != len(entries):
            raise ValueError(f"ensembles must hold the report's {len(entries)} posteriors; got {len(ensembles)}")
        for k, (ens, entry) in enumerate(zip(ensembles, entries)):
            _report.check_same_posterior(ens, entry, path, name=f"ensembles[{k}]")
        settings = _report.explorer_settings(entries[0])
        settings["samples"] = max(e["state"]["samples"] for e in entries)
        labels = kwargs.pop("labels", [e["column"] for e in entries])
        return cls(ensembles, data, labels=labels, **{**settings, **kwargs})
