"""The bqplot charts linked to an explorer: predictive, spread, attack path, fading gradient.

Each builder returns a figure plus a function that writes one :class:`jostle.live.engine.ViewData`
into its marks. Class names reach bqplot only as tick labels, which it draws as SVG text.
Axis ranges and ticks come from :mod:`jostle.common.ticks`; this module only places them.
"""
from __future__ import annotations

from collections.abc import Callable
from typing import Any

import bqplot as bq
import ipywidgets as w
import numpy as np

from jostle.common.ticks import (  # noqa: F401 (share_axis is the sweep chart's too)
    count_axis,
    log_ticks,
    loss_axis_for,
    share_axis,
    step_ticks,
    thinned,
    tick_label_limit,
)

from ._palette import ATTACK_COLOUR, INPUT_COLOUR

# the same fallbacks as js/theme.css (--jostle-ink, --jostle-muted)
INK = "var(--jp-ui-font-color1, #26241f)"
MUTED = "var(--jp-ui-font-color2, #615c53)"
# The title sits in the top margin, centred half-way up it: 40 px leaves a 12 px title clear
# of the plot area and of the top tick label.
_MARGIN = dict(top=40, bottom=40, left=62, right=56)
_TITLE_STYLE = {"font-size": "12px"}
PROBABILITY_TICKS = np.array([0.0, 0.25, 0.5, 0.75, 1.0])
_BAR_WIDTH = 12
_OFFSET = 0.18


def _figure(testid: str, title: str, marks: list, axes: list, height: str = "210px") -> bq.Figure:
    for axis in axes:
        # bqplot's default puts a side axis's title across its tick labels ("0.002" under "loss")
        if axis.side in ("left", "right"):
            axis.label_offset = "46px" if axis.side == "left" else "42px"
    figure = bq.Figure(marks=marks, axes=axes, title=title, fig_margin=dict(_MARGIN),
                       title_style=dict(_TITLE_STYLE),
                       layout=w.Layout(width="100%", min_width="240px", height=height),
                       animation_duration=0)
    figure.add_class(f"jostle-tid-{testid}")
    return figure


def predictive_chart() -> tuple[bq.Figure, Callable[[Any], None]]:
    """Bars of the posterior predictive at the input and at the attacked input, 5-95% whiskers."""
    xs, ys = bq.LinearScale(min=-0.6, max=1.6), bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
    scales = {"x": xs, "y": ys}
    bars = [bq.Lines(x=[[0.0, 0.0]], y=[[0.0, 0.0]], scales=scales, stroke_width=_BAR_WIDTH, colors=[colour])
            for colour in (INPUT_COLOUR, ATTACK_COLOUR)]
    whiskers = [bq.Lines(x=[[0.0, 0.0]], y=[[0.0, 0.0]], scales=scales, stroke_width=1.5, colors=[INK])
                for _ in range(2)]
    x_axis = bq.Axis(scale=xs, tick_values=np.array([0, 1]), tick_labels={"0": "0", "1": "1"},
                     grid_lines="none", label="class (whiskers: 5-95% of members)")
    y_axis = bq.Axis(scale=ys, side="left", label="probability", tick_format=".2f",
                     tick_values=PROBABILITY_TICKS)
    figure = _figure("predictive-chart", "input (left), attacked (right)", bars + whiskers, [x_axis, y_axis])

    def update(view: Any) -> None:
        classes = list(view.classes)
        positions = np.arange(len(classes), dtype=float)
        with xs.hold_sync(), x_axis.hold_sync():
            xs.min, xs.max = -0.6, len(classes) - 0.4
            x_axis.tick_values = positions
            limit = tick_label_limit(len(classes))
            x_axis.tick_labels = {str(int(c)): _short(name, limit) for c, name in zip(positions, classes)}
        width = float(max(3, min(_BAR_WIDTH, 100 // max(1, len(classes)))))
        for k, point in enumerate((view.before, view.after)):
            at = positions + (2 * k - 1) * _OFFSET
            if point is None:
                bars[k].visible = whiskers[k].visible = False
                continue
            with bars[k].hold_sync():
                bars[k].x, bars[k].y = np.stack([at, at], 1), np.stack([np.zeros_like(at), point.probs], 1)
                bars[k].colors = [bars[k].colors[0]] * len(classes)
                bars[k].stroke_width = width
                bars[k].visible = True
            with whiskers[k].hold_sync():
                whiskers[k].x, whiskers[k].y = np.stack([at, at], 1), np.stack([point.lower, point.upper], 1)
                whiskers[k].colors = [INK] * len(classes)
                whiskers[k].visible = True

    return figure, update


def spread_chart() -> tuple[bq.Figure, w.Label, Callable[[Any], None]]:
    """Histogram over members of the predicted class's probability, with the uncertainty split."""
    xs = bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
    ys = bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
    scales = {"x": xs, "y": ys}
    bars = [bq.Lines(x=[0.0, 1.0], y=[0.0, 0.0], scales=scales, colors=[colour], fill="bottom",
                     fill_colors=[colour], fill_opacities=[0.45], stroke_width=1.5, line_style=style)
            for colour, style in ((INPUT_COLOUR, "solid"), (ATTACK_COLOUR, "dashed"))]
    x_axis = bq.Axis(scale=xs, label="p(predicted class): input grey, attacked dashed", tick_format=".2f",
                     tick_values=PROBABILITY_TICKS)
    y_axis = bq.Axis(scale=ys, side="left", label="members", tick_format="d", tick_values=np.array([0, 1]))
    figure = _figure("spread-chart", "spread over members", bars, [x_axis, y_axis])
    lines = [w.Label(""), w.Label("")]
    for line in lines:
        line.add_class("jostle-wrap")
    text = w.VBox(lines, layout=w.Layout(width="100%"))
    text.add_class("jostle-tid-uncertainty-text")

    def update(view: Any) -> None:
        spread = view.spread
        shown = [c for c in (spread.before, spread.after) if c is not None]
        # 0..S members, the same for input and attacked and across updates, so bars compare
        top, ticks = count_axis(max((float(np.sum(c)) for c in shown), default=0.0))
        with ys.hold_sync(), y_axis.hold_sync():
            ys.min, ys.max = 0.0, top
            y_axis.tick_values = ticks
        for k, counts in enumerate((spread.before, spread.after)):
            with bars[k].hold_sync():
                bars[k].visible = counts is not None
                if counts is not None:
                    bars[k].x, bars[k].y = np.repeat(spread.edges, 2)[1:-1], np.repeat(counts, 2)
        lines[0].value = _split("input", view.before)
        lines[1].value = "" if view.after is None else _split("attacked", view.after)

    return figure, text, update


def path_chart() -> tuple[bq.Figure, Callable[[Any], None]]:
    """Loss (left axis) and the attacked label's probability (right axis) along the attack path."""
    xs = bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
    # Every domain and tick list is set here, never guessed by bqplot: a flat or non-finite
    # loss would otherwise leave it an empty tick list, whose guessed format is ".undefinedg".
    loss_scale = bq.LinearScale(min=-0.05, max=1.0, allow_padding=False)
    prob_scale = bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
    loss = bq.Lines(x=[0.0], y=[0.0], scales={"x": xs, "y": loss_scale}, colors=[ATTACK_COLOUR], stroke_width=2)
    prob = bq.Lines(x=[0.0], y=[0.0], scales={"x": xs, "y": prob_scale}, colors=[INK], line_style="dashed",
                    stroke_width=1.5)
    step_axis = bq.Axis(scale=xs, label="attack step", tick_format="d", tick_values=np.array([0, 1]))
    loss_axis = bq.Axis(scale=loss_scale, side="left", label="loss (solid)", tick_format=".2f",
                        tick_values=np.array([0.0, 0.5, 1.0]))
    axes = [step_axis, loss_axis,
            bq.Axis(scale=prob_scale, side="right", label="p(label) (dashed)", tick_format=".2f",
                    tick_values=PROBABILITY_TICKS)]
    figure = _figure("path-chart", "along the attack path", [loss, prob], axes)

    def update(view: Any) -> None:
        attack = view.attack
        for mark in (loss, prob):
            mark.visible = attack is not None
        if attack is None:
            return
        steps = np.arange(attack.loss.shape[0], dtype=float)
        axis = loss_axis_for(attack.loss)
        last = max(1.0, float(steps[-1]) if steps.size else 1.0)
        with xs.hold_sync(), step_axis.hold_sync():
            xs.min, xs.max = 0.0, last
            step_axis.tick_values = step_ticks(last)
        with loss_scale.hold_sync(), loss_axis.hold_sync():
            loss_scale.min, loss_scale.max = axis.low, axis.high
            loss_axis.tick_values, loss_axis.tick_format = axis.ticks, axis.tick_format
        with loss.hold_sync():
            loss.x, loss.y = steps, _finite_or_nan(attack.loss)
        with prob.hold_sync():
            prob.x, prob.y = steps, np.clip(_finite_or_nan(attack.label_prob), 0.0, 1.0)

    return figure, update


FADE_CAPTION = ("solid: norm of the mean input gradient over S random members (band: min to max); "
                "dashed: 1/sqrt(S) from S = 1; dotted: the attacker's S")


def fade_chart() -> tuple[bq.Figure, Callable[[Any], None]]:
    """Expected-gradient norm against the number of samples (log-log), 1/sqrt(S) reference."""
    xs, ys = bq.LogScale(), bq.LogScale()
    scales = {"x": xs, "y": ys}
    band = bq.Lines(x=[1.0], y=[[1.0], [1.0]], scales=scales, fill="between", colors=[MUTED, MUTED],
                    fill_colors=[MUTED], fill_opacities=[0.2], stroke_width=0.5)
    mean = bq.Lines(x=[1.0], y=[1.0], scales=scales, colors=[ATTACK_COLOUR], stroke_width=2, marker="circle",
                    marker_size=16)
    reference = bq.Lines(x=[1.0], y=[1.0], scales=scales, colors=[INK], line_style="dashed", stroke_width=1)
    current = bq.Lines(x=[1.0, 1.0], y=[1.0, 1.0], scales=scales, colors=[INK], stroke_width=1, line_style="dotted")
    x_axis = bq.Axis(scale=xs, label="posterior samples S", tick_format="d", tick_values=np.array([1, 10]))
    y_axis = bq.Axis(scale=ys, side="left", label="gradient norm", tick_format=".2~g", tick_values=np.array([1.0]))
    figure = _figure("fade-chart", "expected gradient against samples", [band, mean, reference, current],
                     [x_axis, y_axis])

    def update(view: Any) -> None:
        fade = view.fade
        for mark in (band, mean, reference, current):
            mark.visible = fade is not None
        if fade is None:
            return
        counts = fade.counts.astype(float)
        positive = np.maximum(np.concatenate([fade.norm_low, fade.norm_high, fade.reference]), 1e-12)
        with band.hold_sync():
            band.x, band.y = counts, np.maximum(np.stack([fade.norm_low, fade.norm_high]), 1e-12)
        with mean.hold_sync():
            mean.x, mean.y = counts, np.maximum(fade.norm_mean, 1e-12)
        with reference.hold_sync():
            reference.x, reference.y = counts, np.maximum(fade.reference, 1e-12)
        with current.hold_sync():
            s = float(view.state.samples)
            current.x, current.y = np.array([s, s]), np.array([positive.min(), positive.max()])
        x_axis.tick_values = thinned(counts, 4)
        y_axis.tick_values = log_ticks(float(positive.min()), float(positive.max()))

    return figure, update


def _finite_or_nan(values: Any) -> np.ndarray:
    out = np.asarray(values, dtype=np.float64).copy()
    out[~np.isfinite(out)] = np.nan
    return out


def _short(name: str, limit: int = 12) -> str:
    """A tick label short enough not to run into its neighbours (the legend shows it whole)."""
    text = str(name)
    return text if len(text) <= limit else text[: limit - 1] + "\u2026"


def _split(name: str, point: Any) -> str:
    return (f"{name}: total {point.total:.3f}, aleatoric {point.aleatoric:.3f}, "
            f"epistemic {point.epistemic:.3f} nats")


def caption(text: str) -> w.Label:
    """A wrapping plain-text note under a chart."""
    label = w.Label(text, layout=w.Layout(width="100%"))
    label.add_class("jostle-wrap")
    label.add_class("jostle-caption")
    return label
