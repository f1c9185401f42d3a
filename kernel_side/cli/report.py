"""Subcommand ``jostle report``: self-contained HTML reports of a sweep store or a notebook.

A sweep store (``.sqlite``) holds every number its chart shows, so the command draws the
chart for each attack and budget. A notebook (``.ipynb``) holds neither its posteriors nor
its views, only the code that makes them, so the command runs it headless in a fresh kernel
(nbclient, the notebook's folder as working directory) and then writes the report of every
explorer the notebook left open, as ``explorer.report()`` would.
"""
from __future__ import annotations

import argparse
from pathlib import Path

from jostle.cli.errors import CommandError

__all__ = ["register", "notebook_reports"]

def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``report``."""
    report = subparsers.add_parser(
        "report", help="write self-contained HTML reports of a sweep store or a notebook's explorers",
        description="Write HTML files that open offline (every asset inline). For a sweep store: one file with the "
                    "robustness-against-accuracy chart of each attack and budget, correlations, run table and "
                    "cautions. For a notebook: run it in a fresh kernel, then write one report per explorer it "
                    "left open (NOTEBOOK-<k>-<kind>.html).",
    )
    report.add_argument("source", help="a sweep store (.sqlite) written by 'jostle sweep run', or a notebook (.ipynb)")
    report.add_argument("--out", help="store: the HTML file to write (default: SOURCE with '-report.html'); "
                                      "notebook: the folder for the reports (default: the notebook's folder)")
    report.add_argument("--timeout", type=float, default=600.0,
                        help="notebook: seconds each cell may run (default 600)")
    report.add_argument("--measure", choices=("robustness", "unflipped"), default="robustness",
                        help="y axis: softmax robustness (default) or 1 - attack success rate")
    report.set_defaults(handler=_report, command="report")


def _report(args: argparse.Namespace) -> int:
    source = Path(args.source)
    if not source.is_file():
        raise CommandError(f"source must be an existing sweep store or notebook; got {str(source)!r}")
    if source.suffix.lower() == ".ipynb":
        for path in notebook_reports(source, Path(args.out) if args.out else source.parent, args.timeout):
            print(f"wrote {path}")
        return 0
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


def notebook_reports(source: Path, folder: Path, timeout: float = 600.0) -> list[Path]:
    """Run the notebook ``source`` in a fresh kernel and write the report of each explorer it left open.

    Raises CommandError naming the cell when the notebook fails, and when it opens no explorer.
    """
    import nbformat
    from nbclient import NotebookClient
    from nbclient.exceptions import CellExecutionError

    try:
        notebook = nbformat.read(str(source), as_version=4)
    except Exception as err:  # nbformat raises several kinds for a file that is not a notebook
        raise CommandError(f"{source} is not a readable notebook ({type(err).__name__}: {err})") from None
    folder = folder.resolve()
    folder.mkdir(parents=True, exist_ok=True)
    notebook.cells.append(nbformat.v4.new_code_cell(
        "import jostle.widgets.report as _jostle_report\n"
        f"for _jostle_path in _jostle_report.report_open_explorers({str(folder)!r}, {source.stem!r}):\n"
        "    print(_jostle_path)"))
    client = NotebookClient(notebook, timeout=timeout, kernel_name="python3",
                            resources={"metadata": {"path": str(source.resolve().parent)}})
    try:
        client.execute()
    except CellExecutionError as err:
        failed = next((k for k, cell in enumerate(notebook.cells, 1) if any(
            out.get("output_type") == "error" for out in cell.get("outputs", []))), None)
        where = "the report step" if failed == len(notebook.cells) else f"cell {failed}"
        raise CommandError(f"{source}: running the notebook failed in {where}: "
                           f"{str(err).strip().splitlines()[-1]}") from None
    printed = "".join(out.get("text", "") for out in notebook.cells[-1].outputs if out.get("name") == "stdout")
    written = [Path(line) for line in printed.splitlines() if line.strip()]
    if not written:
        raise CommandError(f"{source} ran but left no open jostle explorer to report; show an Explorer, "
                           "ImageExplorer, Comparison or SweepExplorer in it (and do not close it)")
    return written
