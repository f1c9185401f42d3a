"""One line saying what is being computed, how long the last update took, or what went wrong."""
from __future__ import annotations

import anywidget
import traitlets as t

from ._assets import asset_path

CAUTION = ("Attack results are empirical evidence: an attack that fails here does not certify "
           "that the model is robust at this input.")


class StatusLine(anywidget.AnyWidget):
    """Status text plus a standing caution note.

    Its view also copies ``jostle-tid-<id>`` classes of the surrounding widgets into
    ``data-testid`` attributes (ipywidgets containers cannot set attributes themselves).
    """

    _esm = asset_path("status_line.js")
    _css = asset_path("theme.css")

    message = t.Unicode("", help="what happened last, as plain text").tag(sync=True)
    state = t.Unicode("idle", help="idle, busy or error").tag(sync=True)
    caution = t.Unicode(CAUTION, help="standing note shown under the status").tag(sync=True)
