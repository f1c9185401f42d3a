"""jostle's colours, mirrored from ``js/theme.css`` for the bqplot marks drawn from Python.

Class colours follow Paul Tol's colour-blind-safe "muted" scheme (Tol 2021, "Colour Schemes",
SRON/EPS/TN/09-002); the attack colour is Tol's "vibrant" orange, apart from every class colour.
"""
from __future__ import annotations

CLASS_COLOURS = (
    "#44aa99",  # teal
    "#882255",  # wine
    "#ddcc77",  # sand
    "#332288",  # indigo
    "#88ccee",  # cyan
    "#999933",  # olive
    "#cc6677",  # rose
    "#117733",  # green
    "#aa4499",  # purple
    "#777777",  # grey
)
ATTACK_COLOUR = "#ee7733"
INPUT_COLOUR = "#8a8a8a"
