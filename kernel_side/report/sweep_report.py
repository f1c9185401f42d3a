"""The report's sections for a sweep: the robustness-against-accuracy chart and its correlations."""
from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any

from jostle.report.charts import sweep_drawing
from jostle.report.document import esc, render_page, table, write_report
from jostle.report.provenance import finite_json, software_versions
from jostle.sweeps.chart_data import ROBUSTNESS_MEASURES, sweep_view
from jostle.sweeps.results_db import RunStore

__all__ = ["sweep_section", "store_report"]


def _show(value: float, method: str) -> str:
    if math.isnan(value):
        return "n too small" if method == "n too small" else "n/a"
    return f"{value:.3f}"


def sweep_section(frame: Any, methods: list[str], budget: float, attack: str, measure: str) -> tuple[str, dict]:
    """HTML (escaped) and state entry of the sweep chart for one filter setting."""
    points, correlations = sweep_view(frame, methods, budget, attack, measure)
    title = ROBUSTNESS_MEASURES[measure]
    drawing = sweep_drawing(points, title)
    rows = [[c.family, str(c.n), _show(c.pearson_r, c.p_method), _show(c.pearson_p, c.p_method),
             _show(c.spearman_rho, c.p_method), _show(c.spearman_p, c.p_method), c.p_method] for c in correlations]
    runs = [[key[:12], method, f"{acc:.4f}", f"{value:.4f}"]
            for key, method, acc, value in zip(points.keys, points.methods, points.accuracy, points.value)]
    heading = f"attack {attack}, budget {budget:g}"
    body = (f"<section class=\"jostle-report-sweep\"><h2>{esc(heading)}</h2>"
            f"<div class=\"jostle-views\"><figure data-view=\"sweep\">{drawing.svg()}<figcaption>"
            f"{esc(title)} against test accuracy: deterministic runs rose triangles, Bayesian runs indigo circles"
            "</figcaption></figure></div>"
            + table([("methods", ", ".join(methods)), ("attack", attack), ("budget", f"{budget:g}"),
                     ("measure", title)], testid="report-sweep-settings")
            + table(rows, head=["family", "n", "Pearson r", "p", "Spearman rho", "p", "p from"],
                    testid="report-correlations")
            + table(runs, head=["run", "method", "test accuracy", title], testid="report-runs")
            + "</section>")
    entry = {"kind": "sweep_chart", "methods": list(methods), "budget": float(budget), "attack": attack,
             "measure": measure, "points": {"keys": points.keys, "accuracy": points.accuracy,
                                            "value": points.value, "family": points.family,
                                            "methods": points.methods},
             "correlations": [c.__dict__ for c in correlations]}
    return body, finite_json(entry)


def store_report(store: str | os.PathLike, path: str | os.PathLike, measure: str = "robustness") -> Path:
    """Write a report of every attack and budget in a sweep store (all methods shown)."""
    with RunStore(store, readonly=True) as db:
        frame = db.results()
    if not len(frame):
        raise ValueError(f"store {str(store)!r} has no finished runs to report")
    methods = sorted(frame["method"].unique().tolist())
    bodies, entries = [], []
    for attack in dict.fromkeys(frame["attack"].tolist()):
        for budget in sorted({float(b) for b in frame[frame["attack"] == attack]["budget"].dropna()}):
            body, entry = sweep_section(frame, methods, budget, attack, measure)
            bodies.append(body)
            entries.append(entry)
    name = Path(store).name
    page = render_page(f"jostle sweep report: {name}", f"{frame['key'].nunique()} runs from the store {name}.",
                       "".join(bodies), {"kind": "sweep_store", "entries": entries, "software": software_versions()})
    return write_report(path, page)
