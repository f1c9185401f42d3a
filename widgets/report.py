"""Reports, slide figures and restoring from a report, for every explorer widget.

The widgets' ``report``, ``figure`` and ``from_report`` methods call these; the drawing and
the page come from :mod:`jostle.report`, which imports no widget library.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np

from jostle.report import explorer_figures, explorer_section, posterior_sha256, read_report_state, save_drawing
from jostle.report.document import render_page, write_report
from jostle.report.provenance import software_versions
from jostle.report.sweep_report import sweep_section

from ._wire import from_wire


def _view(explorer: Any, timeout: float) -> Any:
    if not explorer.wait(timeout) or explorer.result is None:
        raise RuntimeError(f"the explorer has no view to report after {timeout:g} s (status: {explorer.status[1]})")
    return explorer.result


def _context(explorer: Any) -> dict:
    """What a view needs besides its data: the map's box and points, or the image's shape."""
    if hasattr(explorer, "_map"):
        return {"bounds": explorer._bounds,
                "train": (from_wire(explorer._map.train_points), from_wire(explorer._map.train_labels))}
    return {"image": {"shape": list(explorer._shape), "value_range": list(explorer._value_range)}}


def _kind(explorer: Any) -> str:
    return "explorer" if hasattr(explorer, "_map") else "image"


def _extra(explorer: Any) -> dict:
    if _kind(explorer) == "image":
        return {"index": int(explorer.index), "strip": int(explorer._images.shape[0])}
    return {"bounds": [list(b) for b in explorer._bounds]}


def _title(explorer: Any) -> str:
    """The explorer's own title line (data set, method, S), as the live view shows it."""
    first = explorer.children[0] if explorer.children else None
    return str(first.value) if isinstance(getattr(first, "value", None), str) else ""


def section(explorer: Any, heading: str, timeout: float = 60.0) -> tuple[str, dict]:
    """The HTML and state entry of one live explorer's current view."""
    title = _title(explorer)
    return explorer_section(_view(explorer, timeout), explorer._ens, _kind(explorer),
                            f"{heading} - {title}" if title else heading,
                            extra={**_extra(explorer), "column": heading}, **_context(explorer))


def report_open_explorers(folder: Any, stem: str, timeout: float = 60.0) -> list[Path]:
    """Write one report per explorer still open in this session, ``<folder>/<stem>-<k>-<kind>.html``.

    ``jostle report NOTEBOOK.ipynb`` runs the notebook and then calls this in its kernel, so
    every Explorer, ImageExplorer, Comparison and SweepExplorer the notebook left open gets
    the same report its own ``report()`` writes.
    """
    from ._shown import open_views

    folder = Path(folder)
    return [view.report(folder / f"{stem}-{k}-{type(view).__name__.lower()}.html", timeout=timeout)
            for k, view in enumerate(open_views(), start=1)]


def explorers_report(explorers: list, headings: list[str], path: Any, title: str, kind: str,
                     timeout: float = 60.0) -> Path:
    """Write the report of one or more explorers (a Comparison's columns)."""
    parts = [section(e, h, timeout) for e, h in zip(explorers, headings)]
    names = sorted({e._ens.meta.get("method", "posterior") for e in explorers})
    page = render_page(title, f"{kind} report of {', '.join(names)}.", "".join(p[0] for p in parts),
                       {"kind": kind, "entries": [p[1] for p in parts], "software": software_versions()})
    return write_report(path, page)


def sweep_report(sweep: Any, path: Any, title: str, timeout: float = 60.0) -> Path:
    """Write the report of a SweepExplorer: its chart as filtered, and the opened run if any."""
    if not len(sweep._frame):
        raise ValueError("the sweep explorer has no finished runs to report")
    body, entry = sweep_section(sweep._frame, list(sweep.methods), sweep.budget, sweep.attack, sweep.measure)
    entry.update(selected_key=sweep.selected_key)
    bodies, entries = [body], [entry]
    if sweep.opened is not None:
        more, opened = section(sweep.opened, f"run {sweep.selected_key[:12]}", timeout)
        bodies.append(more)
        entries.append(opened)
    page = render_page(title, f"sweep report of {Path(str(sweep._store_path)).name}.", "".join(bodies),
                       {"kind": "sweep_explorer", "entries": entries, "software": software_versions()})
    return write_report(path, page)


def figure(explorer: Any, name: str, path: Any, timeout: float = 60.0) -> Path:
    """Write one view of an explorer as SVG or PNG (by the file's suffix)."""
    drawings = explorer_figures(_view(explorer, timeout), **_context(explorer))
    if name not in drawings:
        raise ValueError(f"name must be one of {list(drawings)}; got {name!r}")
    return save_drawing(drawings[name], path)


def entries_of(path: Any, kinds: tuple[str, ...], report_kinds: tuple[str, ...]) -> list[dict]:
    """The report's explorer entries, refusing a report of another kind."""
    if not isinstance(path, (str, os.PathLike)):
        raise ValueError(f"path must be a str or os.PathLike report file; got {type(path).__name__}")
    state = read_report_state(path)
    if state.get("kind") not in report_kinds:
        raise ValueError(f"path must be a report of {' or '.join(report_kinds)}; {path} is a report of "
                         f"{state.get('kind')!r}")
    entries = [e for e in state.get("entries", []) if e.get("kind") in kinds]
    if not entries:
        raise ValueError(f"{path} holds no {' or '.join(kinds)} view to restore")
    return entries


def check_same_posterior(ens: Any, entry: dict, path: Any, name: str = "ens") -> None:
    """Refuse an ensemble whose parameters differ from those the report was made with."""
    found, wanted = posterior_sha256(ens), entry.get("posterior_sha256")
    if found != wanted:
        raise ValueError(
            f"{name} must be the posterior the report {str(path)!r} was made with: its parameters' sha256 is "
            f"{found[:16]}..., the report's is {str(wanted)[:16]}... (load the posterior file the report "
            f"describes; method {entry.get('provenance', {}).get('method')!r}, "
            f"S = {entry.get('provenance', {}).get('members')})")


def explorer_settings(entry: dict) -> dict:
    """Constructor arguments of an Explorer from a report entry."""
    s = entry["state"]
    names = ("budget", "samples", "method", "norm", "steps", "objective", "seed")
    settings = {k: s[k] for k in names}
    if entry["kind"] == "explorer":
        settings.update(point=list(s["point"]), layer=s["layer"], grid=s["grid"], boundaries=s["boundaries"])
    else:
        settings.update(index=int(entry["index"]), strip=int(entry["strip"]))
    return settings


def check_same_image(data: Any, entry: dict, path: Any) -> None:
    """Refuse image data whose chosen test image is not the one the report shows."""
    index = int(entry["index"])
    if index >= data.x_test.shape[0]:
        raise ValueError(f"data must hold the report's test image {index}; it has {data.x_test.shape[0]} test images")
    here = data.x_test[index].numpy().astype(np.float64).ravel()
    if here.shape != (len(entry["state"]["point"]),) or not np.array_equal(here, np.asarray(entry["state"]["point"])):
        raise ValueError(f"data must be the data set the report {str(path)!r} was made with: its test image "
                         f"{index} differs from the report's")
