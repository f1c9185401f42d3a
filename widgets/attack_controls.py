"""Native range inputs and selects for the attack settings (keyboard-usable, with data-testids)."""
from __future__ import annotations

from typing import Any

import anywidget
import traitlets as t

from jostle.attacks.run import attack_choices

from ._assets import asset_path


class AttackControls(anywidget.AnyWidget):
    """Budget, samples, steps, method, norm and objective controls.

    The owning explorer validates every value and writes the accepted one back, so a
    rejected value snaps the control back to the last good setting. The method, norm and
    objective choices come from the attack registry (read when the widget is made); the
    view offers each method's own norms and objectives and, when the method changes to one
    that lacks the current norm or objective, switches to the method's default.
    """

    _esm = asset_path("attack_controls.js")
    _css = asset_path("theme.css")

    budget = t.Float(0.1, help="attack budget eps").tag(sync=True)
    budget_max = t.Float(1.0, help="right end of the budget slider").tag(sync=True)
    samples = t.Int(1, help="posterior samples the attacker averages over").tag(sync=True)
    samples_max = t.Int(
        1, help="right end of the samples slider (the ensemble's size, or a comparison's largest)"
    ).tag(sync=True)
    samples_note = t.Unicode("", help="shown beside the samples slider instead of its value when set, "
                                      "e.g. '1 of 1' (plain text)").tag(sync=True)
    steps = t.Int(40, help="attack iterations").tag(sync=True)
    steps_max = t.Int(200, help="right end of the steps slider").tag(sync=True)
    method = t.Unicode("pgd", help="attack method").tag(sync=True)
    norm = t.Unicode("inf", help="perturbation norm: inf or 2").tag(sync=True)
    objective = t.Unicode("expected_loss", help="what the attacker ascends").tag(sync=True)
    attacks = t.Dict(help="methods offered, in order, each with its norms and objectives (default first), "
                          "gradient_free flag and one-line description; from the attack registry").tag(sync=True)

    def __init__(self, **kwargs: Any):
        kwargs.setdefault("attacks", attack_choices())
        super().__init__(**kwargs)
