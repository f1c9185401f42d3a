"""The live views redrawn as :class:`~jostle.report.drawing.Drawing` objects, from view data.

One function per view; each takes the numbers the live widget draws (a
:class:`jostle.live.engine.ViewData` or the sweep's :class:`~jostle.sweeps.chart_data.SweepPoints`)
and the same ticks (:mod:`jostle.common.ticks`), and returns a drawing in the live palette.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np

from jostle.common.ticks import count_axis, log_ticks, loss_axis_for, share_axis, step_ticks, thinned
from jostle.report import palette as pal
from jostle.report.drawing import Drawing, hex_rgb

__all__ = ["map_drawing", "predictive_drawing", "spread_drawing", "path_drawing", "fade_drawing",
           "image_drawing", "sweep_drawing", "Frame"]

WIDTH, HEIGHT = 360, 230
_PROB_TICKS = [0.0, 0.25, 0.5, 0.75, 1.0]


class Frame:
    """A plot area inside a drawing with linear or log axes; maps data to pixels."""

    def __init__(self, drawing: Drawing, x: tuple[float, float], y: tuple[float, float], log: bool = False,
                 margin: tuple[int, int, int, int] = (34, 52, 40, 56)):
        self.d, self.log = drawing, log
        top, right, bottom, left = margin
        self.left, self.top = left, top
        self.w, self.h = drawing.width - left - right, drawing.height - top - bottom
        self.x0, self.x1 = (math.log10(v) for v in x) if log else x
        self.y0, self.y1 = (math.log10(v) for v in y) if log else y

    def px(self, x: float) -> float:
        x = math.log10(max(x, 1e-300)) if self.log else x
        return self.left + (x - self.x0) / ((self.x1 - self.x0) or 1.0) * self.w

    def py(self, y: float) -> float:
        y = math.log10(max(y, 1e-300)) if self.log else y
        return self.top + self.h - (y - self.y0) / ((self.y1 - self.y0) or 1.0) * self.h

    def axes(self, title: str, xlabel: str, ylabel: str, xticks: list[tuple[float, str]],
             yticks: list[tuple[float, str]]) -> None:
        d = self.d
        d.text(d.width / 2, 20, title, size=12, anchor="middle")
        d.line([(self.left, self.top + self.h), (self.left + self.w, self.top + self.h)], pal.INK)
        d.line([(self.left, self.top), (self.left, self.top + self.h)], pal.INK)
        for value, label in xticks:
            x = self.px(value)
            d.line([(x, self.top + self.h), (x, self.top + self.h + 4)], pal.INK)
            d.text(x, self.top + self.h + 15, label, size=10, fill=pal.MUTED, anchor="middle")
        for value, label in yticks:
            y = self.py(value)
            d.line([(self.left - 4, y), (self.left, y)], pal.INK)
            d.line([(self.left, y), (self.left + self.w, y)], pal.BORDER, width=0.5)
            d.text(self.left - 6, y + 3.5, label, size=10, fill=pal.MUTED, anchor="end")
        d.text(self.left + self.w / 2, d.height - 6, xlabel, size=10, fill=pal.MUTED, anchor="middle")
        d.text(14, self.top + self.h / 2, ylabel, size=10, fill=pal.MUTED, anchor="middle", rotate=True)

    def right_axis(self, ticks: list[tuple[float, str]], to_y: Any, label: str) -> None:
        d, x = self.d, self.left + self.w
        d.line([(x, self.top), (x, self.top + self.h)], pal.INK)
        for value, text in ticks:
            y = to_y(value)
            d.line([(x, y), (x + 4, y)], pal.INK)
            d.text(x + 6, y + 3.5, text, size=10, fill=pal.MUTED)
        d.text(d.width - 8, self.top + self.h / 2, label, size=10, fill=pal.MUTED, anchor="middle", rotate=True)


def _labelled(values: Any, fmt: str) -> list[tuple[float, str]]:
    return [(float(v), format(float(v), fmt)) for v in values]


def _class_rgb() -> np.ndarray:
    return np.array([hex_rgb(c) for c in pal.CLASS_COLOURS], dtype=np.float64)


def layer_image(grid: Any) -> np.ndarray:
    """The map's background as RGBA (row 0 = highest y), as ``js/explorer_map.js`` paints it."""
    probs = np.asarray(grid.probs, dtype=np.float64)
    ny, nx, nc = probs.shape
    out = np.zeros((ny, nx, 4))
    if grid.layer == "predictive":
        colours = _class_rgb()[np.arange(nc) % len(pal.CLASS_COLOURS)]
        out[..., :3] = probs @ colours
        best = probs.max(-1)
        out[..., 3] = 0.1 + 0.45 * np.maximum(0.0, (best - 1 / nc) / (1 - 1 / nc))
    else:
        out[..., :3] = hex_rgb(pal.UNCERTAIN_COLOUR)
        top = float(grid.value_max) or 1.0
        out[..., 3] = 0.85 * np.clip(np.asarray(grid.values, dtype=np.float64) / top, 0.0, 1.0)
    out[..., 3] *= 255
    return np.round(out[::-1]).astype(np.uint8)


def map_drawing(view: Any, bounds: tuple, train_x: Any = None, train_y: Any = None,
                certified_radius: float | None = None, size: int = 360) -> Drawing:
    """The input map: layer, member boundaries, training points, eps-ball, path, picked input."""
    (x0, y0), (x1, y1) = bounds[0][:2], bounds[1][:2]
    height = int(round(size * min(1.5, max(0.5, (y1 - y0) / (x1 - x0)))))
    d = Drawing(size, height, label=f"input map at ({view.state.point[0]:.3f}, {view.state.point[1]:.3f})")
    px = lambda x: (x - x0) / (x1 - x0) * size  # noqa: E731
    py = lambda y: height - (y - y0) / (y1 - y0) * height  # noqa: E731
    if view.grid is not None:
        d.image(0, 0, size, height, layer_image(view.grid), smooth=True)
        for seg in np.asarray(view.grid.segments, dtype=np.float64).reshape(-1, 4):
            d.line([(px(seg[0]), py(seg[1])), (px(seg[2]), py(seg[3]))], pal.INK, width=1, opacity=0.4)
    if train_x is not None:
        for (a, b), label in zip(np.asarray(train_x, dtype=np.float64), np.asarray(train_y).astype(int)):
            d.circle(px(a), py(b), 3, fill=pal.CLASS_COLOURS[label % len(pal.CLASS_COLOURS)], stroke=pal.INK,
                     width=0.8)
    s = view.state
    cx, cy = s.point[0], s.point[1]
    if certified_radius is not None and certified_radius > 0:
        _ball(d, px, py, cx, cy, certified_radius, s.norm, pal.CERTIFIED_COLOUR, None)
    _ball(d, px, py, cx, cy, s.budget, s.norm, pal.ATTACK_COLOUR, (4, 3))
    if view.attack is not None and len(view.attack.path):
        path = [(px(p[0]), py(p[1])) for p in np.asarray(view.attack.path, dtype=np.float64)]
        d.line(path, pal.ATTACK_COLOUR, width=2)
        for x, y in path[1:]:
            d.circle(x, y, 1.8, fill=pal.ATTACK_COLOUR)
        ex, ey = path[-1]
        d.polygon([(ex, ey - 6), (ex + 6, ey), (ex, ey + 6), (ex - 6, ey)], pal.ATTACK_COLOUR, stroke=pal.SURFACE)
    d.circle(px(cx), py(cy), 6, stroke=pal.INK, width=2)
    d.line([(px(cx) - 9, py(cy)), (px(cx) + 9, py(cy))], pal.INK, width=2)
    d.line([(px(cx), py(cy) - 9), (px(cx), py(cy) + 9)], pal.INK, width=2)
    d.rect(0, 0, size, height, stroke=pal.BORDER)
    return d


def _ball(d: Drawing, px: Any, py: Any, cx: float, cy: float, radius: float, norm: str, colour: str,
          dash: tuple | None) -> None:
    if norm == "2":
        d.circle(px(cx), py(cy), px(cx + radius) - px(cx), stroke=colour, width=1.5, dash=dash,
                 ry=py(cy - radius) - py(cy))
    else:
        d.rect(px(cx - radius), py(cy + radius), px(cx + radius) - px(cx - radius),
               py(cy - radius) - py(cy + radius), stroke=colour, width=1.5, dash=dash)


def predictive_drawing(view: Any) -> Drawing:
    """Bars of the predictive at the input (grey) and the attacked input (orange), 5-95% whiskers."""
    d = Drawing(WIDTH, HEIGHT, label="posterior predictive at the input and at the attacked input")
    n = len(view.classes)
    f = Frame(d, (-0.6, n - 0.4), (0.0, 1.0))
    f.axes("input (left), attacked (right)", "class (whiskers: 5-95% of members)", "probability",
           [(k, _short(name, 12 if n <= 4 else 6)) for k, name in enumerate(view.classes)],
           _labelled(_PROB_TICKS, ".2f"))
    width = float(max(3, min(12, 100 // max(1, n))))
    for k, point in enumerate((view.before, view.after)):
        if point is None:
            continue
        colour = (pal.INPUT_COLOUR, pal.ATTACK_COLOUR)[k]
        for c in range(n):
            x = f.px(c + (2 * k - 1) * 0.18)
            d.line([(x, f.py(0.0)), (x, f.py(float(point.probs[c])))], colour, width=width)
            d.line([(x, f.py(float(point.lower[c]))), (x, f.py(float(point.upper[c])))], pal.INK, width=1.5)
    return d


def spread_drawing(view: Any) -> Drawing:
    """Histogram over members of the attacked label's probability, input solid, attacked dashed."""
    d = Drawing(WIDTH, HEIGHT, label="spread over members of the predicted class's probability")
    spread = view.spread
    shown = [c for c in (spread.before, spread.after) if c is not None]
    top, ticks = count_axis(max((float(np.sum(c)) for c in shown), default=0.0))
    f = Frame(d, (0.0, 1.0), (0.0, float(top)))
    f.axes("spread over members", "p(predicted class): input grey, attacked dashed", "members",
           _labelled(_PROB_TICKS, ".2f"), _labelled(ticks, ".0f"))
    edges = np.asarray(spread.edges, dtype=np.float64)
    for counts, colour, dash in ((spread.before, pal.INPUT_COLOUR, None), (spread.after, pal.ATTACK_COLOUR, (5, 3))):
        if counts is None:
            continue
        xs, ys = np.repeat(edges, 2)[1:-1], np.repeat(np.asarray(counts, dtype=np.float64), 2)
        outline = [(f.px(x), f.py(y)) for x, y in zip(xs, ys)]
        d.polygon([(f.px(xs[0]), f.py(0.0))] + outline + [(f.px(xs[-1]), f.py(0.0))], colour, opacity=0.45)
        d.line(outline, colour, width=1.5, dash=dash)
    return d


def path_drawing(view: Any) -> Drawing:
    """Loss (solid, left axis) and p(label) (dashed, right axis) along the attack path."""
    d = Drawing(WIDTH, HEIGHT, label="loss and probability of the label along the attack path")
    attack = view.attack
    if attack is None:
        d.text(WIDTH / 2, HEIGHT / 2, "no attack for these settings", anchor="middle", fill=pal.MUTED)
        return d
    loss = np.asarray(attack.loss, dtype=np.float64)
    last = max(1.0, float(loss.shape[0] - 1))
    axis = loss_axis_for(loss)
    f = Frame(d, (0.0, last), (axis.low, axis.high))
    f.axes("along the attack path", "attack step", "loss (solid)", _labelled(step_ticks(last), ".0f"),
           _labelled(axis.ticks, axis.tick_format))
    prob_y = lambda p: f.top + f.h - p * f.h  # noqa: E731
    f.right_axis(_labelled(_PROB_TICKS, ".2f"), prob_y, "p(label) (dashed)")
    steps = np.arange(loss.shape[0], dtype=float)
    d.line([(f.px(s), f.py(v)) for s, v in zip(steps, loss)], pal.ATTACK_COLOUR, width=2)
    probs = np.clip(np.asarray(attack.label_prob, dtype=np.float64), 0.0, 1.0)
    d.line([(f.px(s), prob_y(p)) for s, p in zip(steps, probs)], pal.INK, width=1.5, dash=(5, 3))
    return d


def fade_drawing(view: Any) -> Drawing:
    """Expected-gradient norm against samples S (log-log), min-max band, 1/sqrt(S), the attacker's S."""
    d = Drawing(WIDTH, HEIGHT, label="expected gradient norm against the number of posterior samples")
    fade = view.fade
    if fade is None:
        d.text(WIDTH / 2, HEIGHT / 2, "no fading-gradient data", anchor="middle", fill=pal.MUTED)
        return d
    counts = np.asarray(fade.counts, dtype=float)
    low, high, mean, ref = (np.maximum(np.asarray(v, dtype=np.float64), 1e-12)
                            for v in (fade.norm_low, fade.norm_high, fade.norm_mean, fade.reference))
    allv = np.concatenate([low, high, ref])
    x_hi = max(float(counts.max()), 2.0)
    f = Frame(d, (1.0, x_hi), (float(allv.min()) / 1.2, float(allv.max()) * 1.2), log=True)
    f.axes("expected gradient against samples", "posterior samples S", "gradient norm",
           [(v, f"{v:.0f}") for v in thinned(counts, 4)],
           [(v, f"{v:.2g}") for v in log_ticks(float(allv.min()), float(allv.max()))])
    band = [(f.px(c), f.py(v)) for c, v in zip(counts, high)] + \
           [(f.px(c), f.py(v)) for c, v in zip(counts[::-1], low[::-1])]
    d.polygon(band, pal.MUTED, opacity=0.2)
    d.line([(f.px(c), f.py(v)) for c, v in zip(counts, ref)], pal.INK, width=1, dash=(5, 3))
    d.line([(f.px(c), f.py(v)) for c, v in zip(counts, mean)], pal.ATTACK_COLOUR, width=2)
    for c, v in zip(counts, mean):
        d.circle(f.px(c), f.py(v), 2.5, fill=pal.ATTACK_COLOUR)
    s = float(view.state.samples)
    d.line([(f.px(s), f.py(float(allv.min()))), (f.px(s), f.py(float(allv.max())))], pal.INK, dash=(1.5, 2.5))
    return d


def image_rgba(values: Any, value_range: tuple[float, float], diverging_scale: float | None = None) -> np.ndarray:
    """A greyscale image (light = low, as the live panels) or a diverging perturbation, as RGBA."""
    v = np.asarray(values, dtype=np.float64)
    if diverging_scale is None:
        lo, hi = value_range
        t = np.clip((v - lo) / ((hi - lo) or 1.0), 0.0, 1.0)[..., None]
        rgb = (1 - t) * np.array(hex_rgb(pal.SURFACE)) + t * np.array(hex_rgb(pal.INK))
    else:
        t = np.clip(v / (diverging_scale or 1.0), -1.0, 1.0)[..., None]
        light = np.array(hex_rgb(pal.SURFACE), dtype=np.float64)
        end = np.where(t < 0, np.array(hex_rgb(pal.DIVERGE_LOW)), np.array(hex_rgb(pal.DIVERGE_HIGH)))
        rgb = light + np.abs(t) * (end - light)
    alpha = np.full(v.shape + (1,), 255.0)
    return np.round(np.concatenate([rgb, alpha], -1)).astype(np.uint8)


def image_drawing(rgba: np.ndarray, caption: str, size: int = 180) -> Drawing:
    """One image panel with its caption underneath."""
    d = Drawing(size, size + 24, label=caption)
    d.image(0, 0, size, size, rgba)
    d.rect(0, 0, size, size, stroke=pal.BORDER)
    d.text(size / 2, size + 16, caption, size=10, anchor="middle")
    return d


def sweep_drawing(points: Any, y_title: str, width: int = 520, height: int = 340) -> Drawing:
    """Test accuracy against robustness, deterministic runs rose triangles, Bayesian indigo circles."""
    d = Drawing(width, height, label=f"{y_title} against test accuracy, one mark per run")
    xa, ya = share_axis(points.accuracy), share_axis(points.value)
    f = Frame(d, (xa.low, xa.high), (ya.low, ya.high))
    f.axes(f"{y_title} against accuracy", "test accuracy", y_title,
           list(zip(xa.ticks.tolist(), xa.labels)), list(zip(ya.ticks.tolist(), ya.labels)))
    for x, y, family in zip(points.accuracy, points.value, np.asarray(points.family).astype(int)):
        if not (math.isfinite(x) and math.isfinite(y)):
            continue
        cx, cy = f.px(float(x)), f.py(float(y))
        if family:
            d.circle(cx, cy, 4, fill=pal.FAMILY_COLOURS[1], stroke=pal.SURFACE)
        else:
            d.polygon([(cx, cy - 5), (cx + 4.5, cy + 3.5), (cx - 4.5, cy + 3.5)], pal.FAMILY_COLOURS[0],
                      stroke=pal.SURFACE)
    return d


def _short(name: str, limit: int) -> str:
    text = str(name)
    return text if len(text) <= limit else text[: limit - 1] + "\u2026"
