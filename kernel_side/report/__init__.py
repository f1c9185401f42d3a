"""Self-contained HTML reports of explorer views and sweeps, and their graphics for slides.

No widget library is imported here: the widgets hand over their view data, and the
``jostle report`` command uses the same code for a sweep store.
"""
from __future__ import annotations

from jostle.report.document import read_report_state, render_page, write_report
from jostle.report.drawing import Drawing, save_drawing
from jostle.report.explorer_report import FIGURE_NAMES, explorer_figures, explorer_section, view_numbers
from jostle.report.provenance import CAUTIONS, posterior_sha256, provenance
from jostle.report.sweep_report import store_report, sweep_section

__all__ = ["Drawing", "read_report_state", "render_page", "write_report", "FIGURE_NAMES", "explorer_figures",
           "explorer_section", "view_numbers", "CAUTIONS", "posterior_sha256", "provenance", "store_report",
           "sweep_section", "save_drawing"]

