"""The report's sections for one explorer view: graphics, settings, numbers, provenance.

Everything here reads a :class:`jostle.live.engine.ViewData` (what the live widgets draw)
plus the context a widget holds (data bounds, training points, image shape); the widgets
call it with their own state and imports stay one way (widgets -> jostle).
"""
from __future__ import annotations

from dataclasses import asdict
from typing import Any

import numpy as np

from jostle.live.engine import ViewData
from jostle.report import charts
from jostle.report.document import esc, table
from jostle.report.drawing import Drawing
from jostle.report.palette import CLASS_COLOURS
from jostle.report.provenance import finite_json, provenance

__all__ = ["view_numbers", "explorer_figures", "explorer_section", "SETTING_NAMES", "FIGURE_NAMES"]

SETTING_NAMES = ("method", "budget", "norm", "steps", "samples", "objective", "seed")
FIGURE_NAMES = {"explorer": ("map", "predictive", "spread", "path", "fade"),
                "image": ("original", "perturbation", "attacked", "predictive", "fade")}
_FIGURE_CAPTIONS = {
    "map": "input map: background layer, member boundaries, training points, the eps-ball (dashed orange), "
           "the attack path (orange) and the picked input (cross); a certified ball, where computed, in green",
    "predictive": "posterior predictive at the input (grey) and at the attacked input (orange), 5-95% whiskers",
    "spread": "members' probability of the attacked label, input solid grey, attacked dashed orange",
    "path": "loss (solid) and p(label) (dashed) along the attack path",
    "fade": "norm of the mean input gradient over S random members (band: min to max); dashed: 1/sqrt(S); "
            "dotted: the attacker's S",
}


def _point(p: Any) -> dict | None:
    if p is None:
        return None
    return {"probs": p.probs, "lower": p.lower, "upper": p.upper, "total": p.total, "aleatoric": p.aleatoric,
            "epistemic": p.epistemic, "agreement": p.agreement}


def view_numbers(view: ViewData) -> dict:
    """The numbers a live view shows, as JSON-ready lists (the report embeds them)."""
    attack = view.attack
    out = {"label": int(view.label), "classes": list(view.classes), "before": _point(view.before),
           "after": _point(view.after), "errors": list(view.errors),
           "spread": {"edges": view.spread.edges, "before": view.spread.before, "after": view.spread.after}}
    if attack is not None:
        out["attack"] = {"success": bool(attack.success), "distance": float(attack.distance), "x_adv": attack.x_adv,
                         "loss": attack.loss, "label_prob": attack.label_prob, "path": attack.path}
    if view.fade is not None:
        out["fade"] = {"counts": view.fade.counts, "norm_mean": view.fade.norm_mean, "norm_low": view.fade.norm_low,
                       "norm_high": view.fade.norm_high, "reference": view.fade.reference}
    return finite_json(out)


def certified_radius_of(view: Any) -> float | None:
    """The certified radius of the predictive at the picked input (``view.radius``), or None where
    the view computed none (certificates off, or a network the bounds do not cover)."""
    found = getattr(view, "radius", None)
    return None if found is None else float(found.radius)


def certified_rows(view: Any) -> list[tuple[str, str]]:
    """The certified read-outs of a view as (label, text) rows, each beside its caution."""
    rows: list[tuple[str, str]] = []
    radius = getattr(view, "radius", None)
    if radius is not None:
        flip = "none found" if not np.isfinite(radius.flip) else f"{radius.flip:.4f}"
        rows += [(f"certified radius ({radius.method.upper()}, L-{radius.norm} ball)", f"{radius.radius:.4f}"),
                 ("smallest flipping budget the attack found (an upper bound)", flip),
                 ("in words", radius.words), ("about the certificate", radius.caution)]
    budget = getattr(view, "budget_certificate", None)
    if budget is not None:
        rows += [("certified at the budget", budget.words), ("about the certificate", budget.caution)]
    return rows


def explorer_figures(view: ViewData, bounds: Any = None, train: tuple | None = None,
                     image: dict | None = None) -> dict[str, Drawing]:
    """Each view of one explorer as a drawing, keyed by the names in :data:`FIGURE_NAMES`.

    ``image`` (for image data) holds ``shape`` and ``value_range``; otherwise the map is
    drawn over ``bounds`` with the ``train`` points ``(x, y)``.
    """
    out: dict[str, Drawing] = {}
    if image is None:
        train_x, train_y = train if train is not None else (None, None)
        out["map"] = charts.map_drawing(view, bounds, train_x, train_y, certified_radius_of(view))
    else:
        shape, value_range = tuple(image["shape"]), tuple(image["value_range"])
        original = np.asarray(view.state.point, dtype=np.float64).reshape(shape)
        names = view.classes
        out["original"] = charts.image_drawing(charts.image_rgba(original, value_range),
                                               f"original: {names[view.label]} ({view.before.probs[view.label]:.2f})")
        if view.attack is not None:
            attacked = np.asarray(view.attack.x_adv, dtype=np.float64).reshape(shape)
            delta = attacked - original
            scale = max(float(np.abs(delta).max()), view.state.budget, 1e-6)
            top = int(np.argmax(view.after.probs))
            verdict = "flipped" if view.attack.success else "held"
            out["perturbation"] = charts.image_drawing(charts.image_rgba(delta, value_range, scale),
                                                       f"perturbation (max |delta| {np.abs(delta).max():.3f})")
            out["attacked"] = charts.image_drawing(charts.image_rgba(attacked, value_range),
                                                   f"attacked: {names[top]} ({view.after.probs[top]:.2f}), {verdict}")
    out["predictive"] = charts.predictive_drawing(view)
    if image is None:  # the image explorer shows no spread or path chart live either
        out["spread"] = charts.spread_drawing(view)
        out["path"] = charts.path_drawing(view)
    out["fade"] = charts.fade_drawing(view)
    return out


def settings_rows(view: ViewData) -> list[tuple[str, str]]:
    s = view.state
    rows = [("method", s.method), ("budget (eps)", f"{s.budget:g}"), ("norm", "L-inf" if s.norm == "inf" else "L2"),
            ("steps", str(s.steps)), ("attacker samples", str(s.samples)), ("objective", s.objective),
            ("seed", str(s.seed))]
    if s.grid > 0:
        rows += [("map layer", s.layer), ("map grid", str(s.grid)), ("boundaries drawn", str(s.boundaries))]
    if len(s.point) <= 4:
        rows.insert(0, ("input", ", ".join(f"{v:.6g}" for v in s.point)))
    return rows


def number_rows(view: ViewData) -> tuple[list[list[str]], list[tuple[str, str]]]:
    """Per-class probabilities (the predictive chart) and the attack's summary, as text."""
    per_class = []
    for c, name in enumerate(view.classes):
        row = [name, f"{view.before.probs[c]:.4f}", f"{view.before.lower[c]:.4f}", f"{view.before.upper[c]:.4f}"]
        row.append("-" if view.after is None else f"{view.after.probs[c]:.4f}")
        per_class.append(row)
    summary = [("attacked label", view.classes[view.label])]
    for name, point in (("input", view.before), ("attacked", view.after)):
        if point is not None:
            summary.append((f"uncertainty at the {name} (nats)", f"total {point.total:.4f}, aleatoric "
                            f"{point.aleatoric:.4f}, epistemic {point.epistemic:.4f}"))
    if view.attack is not None:
        summary += [("attack flipped the prediction", "yes" if view.attack.success else "no"),
                    ("distance moved", f"{view.attack.distance:.4f}")]
    summary += certified_rows(view)
    summary += [(f"note: {k + 1}", text) for k, text in enumerate(view.errors)]
    return per_class, summary


def provenance_html(record: dict) -> str:
    rows = [("method", record["method"]), ("posterior samples S", record["members"]),
            ("parameters per member", record["parameters_per_member"])]
    for key in ("drawn_from", "seed", "hyperparameters", "diagnostics", "architecture", "data"):
        if record.get(key) is not None:
            rows.append((key.replace("_", " "), _compact(record[key])))
    rows += [("posterior sha256", record["posterior_sha256"]), ("hash of", record["hash_of"]),
             ("jostle version", record["jostle_version"]), ("torch version", record["torch_version"])]
    return table(rows, testid="report-provenance") + f"<pre>{esc(record['description'])}</pre>"


def explorer_section(view: ViewData, ens: Any, kind: str, heading: str, extra: dict | None = None,
                     **figure_context: Any) -> tuple[str, dict]:
    """HTML of one explorer (escaped) and its entry in the embedded state."""
    record = provenance(ens)
    figures = explorer_figures(view, **figure_context)
    graphics = "".join(f"<figure data-view=\"{esc(name)}\">{drawing.svg()}"
                       f"<figcaption>{_legend(view.classes) if name == 'map' else ''}"
                       f"{esc(_FIGURE_CAPTIONS.get(name, ''))}</figcaption></figure>"
                       for name, drawing in figures.items())
    per_class, summary = number_rows(view)
    body = (f"<section class=\"jostle-report-explorer\" data-kind=\"{esc(kind)}\"><h2>{esc(heading)}</h2>"
            f"<div class=\"jostle-views\">{graphics}</div>"
            f"<h3>Settings</h3>{table(settings_rows(view), testid='report-settings')}"
            "<h3>Posterior predictive</h3>"
            + table(per_class, head=["class", "p at input", "5% of members", "95% of members", "p attacked"],
                    testid="report-predictive")
            + table(summary, testid="report-summary")
            + f"<h3>Posterior provenance</h3>{provenance_html(record)}</section>")
    entry = {"kind": kind, "heading": heading, "state": finite_json(asdict(view.state)),
             "posterior_sha256": record["posterior_sha256"], "provenance": record, "view": view_numbers(view),
             **(extra or {})}
    return body, entry


def _legend(classes: list[str]) -> str:
    """Class colours with their (escaped) names, as the live map's legend."""
    items = "".join(f'<span><span class="jostle-swatch" style="background:{CLASS_COLOURS[k % len(CLASS_COLOURS)]}">'
                    f"</span>{esc(name)}</span>" for k, name in enumerate(classes))
    return f'<span class="jostle-legend" data-testid="report-legend">{items}</span>'


def _compact(value: Any) -> str:
    if isinstance(value, dict):
        return ", ".join(f"{k}={_compact(v)}" for k, v in value.items())
    if isinstance(value, list):
        shown = ", ".join(_compact(v) for v in value[:12])
        return f"[{shown}{', ...' if len(value) > 12 else ''}]"
    if isinstance(value, float):
        return f"{value:.4g}"
    return str(value)
