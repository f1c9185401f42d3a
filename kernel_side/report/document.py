"""The report file: one self-contained HTML page with its state embedded as inert JSON.

Every asset is inline (CSS in a ``<style>`` element, graphics as SVG, rasters as
``data:`` URIs); there is no script to run. The state sits in
``<script type="application/json" id="jostle-state">``, which browsers never execute, with
``<``, ``>``, ``&`` and the line separators written as JSON escapes so no user text can
close the element. :func:`read_report_state` finds that element and parses it with
:func:`json.loads`; nothing in the file is executed or unpickled.
"""
from __future__ import annotations

import html
import json
import os
import re
from collections.abc import Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from jostle.files.posterior_file import atomic_write
from jostle.report import palette as pal
from jostle.report.provenance import CAUTIONS, finite_json

__all__ = ["esc", "table", "render_page", "write_report", "read_report_state", "state_json", "REPORT_FORMAT"]

REPORT_FORMAT = "jostle-report"
REPORT_VERSION = 1
_STATE_OPEN = '<script type="application/json" id="jostle-state">'
_STATE_RE = re.compile(re.escape(_STATE_OPEN) + r"(.*?)</script>", re.S)

_CSS = f"""
:root {{ color-scheme: light; }}
body {{ margin: 0; background: {pal.SURFACE}; color: {pal.INK};
  font: 14px/1.45 system-ui, -apple-system, 'Segoe UI', sans-serif; }}
main {{ max-width: 1180px; margin: 0 auto; padding: 16px 20px 40px; }}
h1 {{ font-size: 20px; margin: 8px 0 4px; }} h2 {{ font-size: 16px; margin: 24px 0 8px;
  border-bottom: 1px solid {pal.BORDER}; padding-bottom: 3px; }} h3 {{ font-size: 14px; margin: 12px 0 6px; }}
.jostle-report-sub {{ color: {pal.MUTED}; margin: 0 0 12px; }}
.jostle-views {{ display: flex; flex-wrap: wrap; gap: 12px; align-items: flex-start; }}
figure {{ margin: 0; background: {pal.SURFACE}; border: 1px solid {pal.BORDER}; padding: 4px; }}
figcaption {{ color: {pal.MUTED}; font-size: 12px; max-width: 360px; }}
table {{ border-collapse: collapse; margin: 4px 0 8px; font-variant-numeric: tabular-nums; }}
th, td {{ border: 1px solid {pal.BORDER}; padding: 2px 8px; text-align: left; vertical-align: top; }}
th {{ background: {pal.RAISED}; font-weight: 600; }}
pre {{ background: {pal.RAISED}; padding: 8px; white-space: pre-wrap; }}
.jostle-legend {{ display: flex; flex-wrap: wrap; gap: 10px; margin: 2px 0 4px; color: {pal.MUTED}; }}
.jostle-legend > span {{ display: inline-flex; align-items: center; gap: 4px; }}
.jostle-swatch {{ width: 10px; height: 10px; border-radius: 50%; display: inline-block; border: 1px solid {pal.INK}; }}
.jostle-cautions {{ border-left: 4px solid {pal.ATTACK_COLOUR}; background: {pal.RAISED}; padding: 6px 12px; }}
"""


def esc(text: Any) -> str:
    """HTML-escape any value shown as text (quotes too, so it is safe in attributes)."""
    return html.escape(str(text), quote=True)


def table(rows: Sequence[Sequence[Any]], head: Sequence[str] | None = None, testid: str = "") -> str:
    """A table whose every cell is escaped text."""
    attr = f' data-testid="{esc(testid)}"' if testid else ""
    out = [f"<table{attr}>"]
    if head:
        out.append("<tr>" + "".join(f"<th>{esc(h)}</th>" for h in head) + "</tr>")
    for row in rows:
        cells = "".join(f"<th>{esc(row[0])}</th>" if k == 0 else f"<td>{esc(c)}</td>" for k, c in enumerate(row))
        out.append(f"<tr>{cells}</tr>")
    out.append("</table>")
    return "".join(out)


def state_json(state: dict) -> str:
    """Strict JSON of the state, safe inside a ``<script>`` element."""
    text = json.dumps(finite_json(state), sort_keys=True, allow_nan=False, ensure_ascii=False)
    for raw, escaped in (("&", "\\u0026"), ("<", "\\u003c"), (">", "\\u003e"),
                         ("\u2028", "\\u2028"), ("\u2029", "\\u2029")):
        text = text.replace(raw, escaped)
    return text


def render_page(title: str, subtitle: str, body: str, state: dict) -> str:
    """The whole HTML page: title, the given body (already escaped), cautions and the state."""
    made = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    cautions = "".join(f"<li>{esc(c)}</li>" for c in CAUTIONS)
    full = {"format": REPORT_FORMAT, "version": REPORT_VERSION, "made": made, **state}
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; "
        "img-src data:\">"
        f"<title>{esc(title)}</title><style>{_CSS}</style></head>"
        f"<body><main class=\"jostle-report\"><h1 data-testid=\"report-title\">{esc(title)}</h1>"
        f"<p class=\"jostle-report-sub\">{esc(subtitle)} Made {esc(made)} by jostle; this file needs no server, "
        "kernel or network.</p>"
        f"{body}"
        f"<h2>Cautions</h2><ul class=\"jostle-cautions\" data-testid=\"report-cautions\">{cautions}</ul>"
        f"</main>{_STATE_OPEN}{state_json(full)}</script></body></html>\n"
    )


def write_report(path: str | os.PathLike, page: str) -> Path:
    """Write the page atomically (temporary file, then rename); returns the path."""
    if not isinstance(path, (str, os.PathLike)) or not str(path):
        raise ValueError(f"path must be a non-empty str or os.PathLike; got {path!r}")
    target = Path(path)
    atomic_write(target, page.encode("utf-8"))
    return target


def read_report_state(path: str | os.PathLike) -> dict:
    """The state embedded in a report file, parsed as JSON (nothing in the file is run).

    Raises
    ------
    ValueError
        If the file holds no jostle report state, or the state is not valid JSON.
    """
    target = Path(path)
    if not target.is_file():
        raise ValueError(f"path must be an existing jostle report file; got {str(target)!r}")
    text = target.read_text(encoding="utf-8", errors="replace")
    found = _STATE_RE.search(text)
    if found is None:
        raise ValueError(f"{target} holds no jostle report state (no <script type=\"application/json\" "
                         f"id=\"jostle-state\"> element); was it written by report()?")
    try:
        state = json.loads(found.group(1))
    except json.JSONDecodeError as err:
        raise ValueError(f"{target}: the embedded report state is not valid JSON ({err})") from None
    if not isinstance(state, dict) or state.get("format") != REPORT_FORMAT:
        raise ValueError(f"{target}: the embedded state is not a {REPORT_FORMAT!r} state")
    if state.get("version") != REPORT_VERSION:
        raise ValueError(f"{target} has report version {state.get('version')!r}; this jostle reads "
                         f"version {REPORT_VERSION}")
    return state
