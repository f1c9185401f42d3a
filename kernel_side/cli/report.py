"""Subcommand ``jostle report``: a self-contained HTML report of a sweep store.

A sweep store (``.sqlite``) holds every number its chart shows, so the command draws the
chart for each attack and budget. A notebook (``.ipynb``) does not: its saved widget
state holds the explorers' settings but neither their posteriors nor their views, so
the command says so (and which settings it found) and points to ``explorer.report()``.
"""
from __future__ import annotations

import argparse
import json
from pathlib import Path

from jostle.cli.errors import CommandError

__all__ = ["register", "notebook_explorers"]

_WIDGET_STATE = "application/vnd.jupyter.widget-state+json"


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``report``."""
    report = subparsers.add_parser(
        "report", help="write a self-contained HTML report of a sweep store",
        description="Write one HTML file that opens offline (every asset inline): the robustness-against-accuracy "
                    "chart of each attack and budget in a sweep store, with correlations, run table and cautions. "
                    "For a notebook's explorers, call explorer.report('finding.html') in the notebook.",
    )
    report.add_argument("source", help="a sweep store (.sqlite) written by 'jostle sweep run'")
    report.add_argument("--out", help="the HTML file to write (default: SOURCE with '-report.html')")
    report.add_argument("--measure", choices=("robustness", "unflipped"), default="robustness",
                        help="y axis: softmax robustness (default) or 1 - attack success rate")
    report.set_defaults(handler=_report, command="report")


def _report(args: argparse.Namespace) -> int:
    source = Path(args.source)
    if not source.is_file():
        raise CommandError(f"source must be an existing sweep store or notebook; got {str(source)!r}")
    if source.suffix.lower() == ".ipynb":
        raise CommandError(_notebook_message(source))
    from jostle.report.sweep_report import store_report
    from jostle.sweeps.results_db import RunStore

    out = Path(args.out) if args.out else source.with_name(source.stem + "-report.html")
    try:
        with RunStore(source, readonly=True):
            pass
        written = store_report(source, out, measure=args.measure)
    except (ValueError, OSError) as err:
        raise CommandError(str(err)) from None
    except Exception as err:  # sqlite3.DatabaseError for a file that is not a store
        raise CommandError(f"{source} is not a readable sweep store ({type(err).__name__}: {err})") from None
    print(f"wrote {written}")
    return 0


def notebook_explorers(notebook: dict) -> list[dict]:
    """Settings of the jostle explorers in a notebook's saved widget state (may be empty)."""
    state = notebook.get("metadata", {}).get("widgets", {}).get(_WIDGET_STATE, {}).get("state", {})
    found = []
    for model in state.values() if isinstance(state, dict) else []:
        values = model.get("state", {}) if isinstance(model, dict) else {}
        if {"budget", "method", "norm", "steps"} <= set(values) and ("point" in values or "index" in values):
            found.append({k: values[k] for k in ("point", "index", "method", "budget", "norm", "steps")
                          if k in values})
    return found


def _notebook_message(path: Path) -> str:
    try:
        notebook = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as err:
        return f"{path} is not a readable notebook ({err})"
    found = notebook_explorers(notebook) if isinstance(notebook, dict) else []
    seen = (f"its saved widget state holds the settings of {len(found)} explorer(s) "
            f"(first: {', '.join(f'{k} {v}' for k, v in found[0].items())})" if found
            else "it holds no saved jostle widget state")
    return (f"{path}: a notebook does not hold the posteriors or the views a report draws; {seen}. "
            "Run the notebook and call explorer.report('finding.html') on the explorer you want to share "
            "(Explorer.from_report restores it later), or pass a sweep store (.sqlite) to 'jostle report'")
