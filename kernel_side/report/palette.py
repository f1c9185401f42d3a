"""The report's colours: the live views' palette (``js/theme.css``, ``widgets/_palette.py``).

Kept here because kernel_side never imports the widgets; ``tests/widgets/test_report.py``
checks that the three copies agree. Class colours: Paul Tol's "muted" scheme, attack colour
Tol's "vibrant" orange (Tol 2021, SRON/EPS/TN/09-002).
"""
from __future__ import annotations

CLASS_COLOURS = ("#44aa99", "#882255", "#ddcc77", "#332288", "#88ccee",
                 "#999933", "#cc6677", "#117733", "#aa4499", "#777777")
ATTACK_COLOUR = "#ee7733"
INPUT_COLOUR = "#8a8a8a"
UNCERTAIN_COLOUR = "#6a3d9a"
DIVERGE_LOW, DIVERGE_HIGH = "#4477aa", "#cc3311"
INK, MUTED = "#26241f", "#615c53"
SURFACE, RAISED, BORDER = "#fbfaf8", "#efede8", "#cbc6bc"
CERTIFIED_COLOUR = "#117733"  # Tol's muted green: the certified ball, apart from the attack's orange
# the two families of the sweep chart (js/sweep_chart.js): deterministic rose, Bayesian indigo
FAMILY_COLOURS = ("#cc6677", "#332288")
