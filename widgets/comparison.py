"""Explorers of several posteriors side by side, sharing one input, budget and sample count."""
from __future__ import annotations

from typing import Any, Sequence

import ipywidgets as w
import traitlets

from .explorer import Explorer

SHARED = ("point", "budget", "samples", "method", "norm", "steps", "objective", "layer")


class Comparison(w.VBox):
    """One :class:`Explorer` per ensemble, linked with ``traitlets.link``.

    Moving the input, the budget or the sample count in any column moves them in all.
    The sample count is clipped to each ensemble's size (a deterministic net has S = 1).

    Parameters
    ----------
    ensembles : sequence of jostle.Ensemble
    data : jostle.Dataset (2 features)
    labels : sequence of str, optional
        Column headings (plain text); default ``ens.meta["method"]`` or ``model k``.
    **explorer_kwargs
        Passed to every :class:`Explorer` (budget, steps, grid, ...).
    """

    def __init__(self, ensembles: Sequence[Any], data: Any, labels: Sequence[str] | None = None,
                 **explorer_kwargs: Any):
        ensembles = list(ensembles)
        if len(ensembles) < 2:
            raise ValueError(f"ensembles must hold at least 2 posteriors to compare; got {len(ensembles)}")
        if labels is None:
            labels = [str(e.meta.get("method", f"model {k + 1}")) for k, e in enumerate(ensembles)]
        labels = [str(label) for label in labels]
        if len(labels) != len(ensembles):
            raise ValueError(f"labels must name each of the {len(ensembles)} ensembles; got {len(labels)}")
        self.explorers = [Explorer(e, data, **explorer_kwargs) for e in ensembles]
        self._links = []
        first = self.explorers[0]
        for other in self.explorers[1:]:
            for name in SHARED:
                transform = _clip_samples(first, other) if name == "samples" else None
                self._links.append(traitlets.link((first, name), (other, name), transform=transform))
        columns = []
        for label, explorer in zip(labels, self.explorers):
            heading = w.Label(label)
            heading.add_class("jostle-column-title")
            heading.add_class("jostle-tid-comparison-label")
            column = w.VBox([heading, explorer], layout=w.Layout(flex="1 1 480px", min_width="420px"))
            column.add_class("jostle-tid-comparison-column")
            columns.append(column)
        super().__init__([w.HBox(columns, layout=w.Layout(flex_flow="row wrap", width="100%"))])
        for name in ("jostle-root", "jostle-comparison", "jostle-tag-scope", "jostle-tid-comparison"):
            self.add_class(name)

    def wait(self, timeout: float = 30.0) -> bool:
        """Block until every explorer has shown its latest view; False on timeout."""
        return all(explorer.wait(timeout) for explorer in self.explorers)

    def close(self) -> None:
        links, self._links = getattr(self, "_links", []), []
        for link in links:
            link.unlink()
        for explorer in getattr(self, "explorers", ()):
            explorer.close()
        super().close()


def _clip_samples(a: Explorer, b: Explorer) -> tuple:
    size_a, size_b = len(a._ens), len(b._ens)
    return (lambda s: min(int(s), size_b)), (lambda s: min(int(s), size_a))
