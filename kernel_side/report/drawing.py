"""One drawing, two outputs: an SVG string for the report and a PNG (Pillow) for slides.

A :class:`Drawing` records shapes in pixel coordinates (y down); :meth:`Drawing.svg` and
:meth:`Drawing.png` both replay the same list, so a slide and the report show one picture.
All text is escaped on the way into the SVG.
"""
from __future__ import annotations

import base64
import html
import io
import math
import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from PIL import Image, ImageDraw, ImageFont

from jostle.files.posterior_file import atomic_write

__all__ = ["Drawing", "png_data_uri", "hex_rgb", "save_drawing"]

FONT = "system-ui, -apple-system, 'Segoe UI', sans-serif"


def hex_rgb(colour: str) -> tuple[int, int, int]:
    """``#rrggbb`` as three 0..255 integers."""
    text = colour.lstrip("#")
    return int(text[0:2], 16), int(text[2:4], 16), int(text[4:6], 16)


def png_bytes(rgba: np.ndarray) -> bytes:
    """A uint8 (H, W, 3 or 4) array as PNG bytes."""
    buffer = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(rgba, dtype=np.uint8)).save(buffer, format="PNG")
    return buffer.getvalue()


def png_data_uri(rgba: np.ndarray) -> str:
    """A uint8 (H, W, 3 or 4) array as an inline ``data:image/png;base64`` URI."""
    return "data:image/png;base64," + base64.b64encode(png_bytes(rgba)).decode("ascii")


def _num(value: float) -> str:
    return f"{value:.2f}".rstrip("0").rstrip(".") if math.isfinite(value) else "0"


def _points(points: Sequence[tuple[float, float]]) -> str:
    return " ".join(f"{_num(x)},{_num(y)}" for x, y in points)


class Drawing:
    """A list of shapes on a ``width`` x ``height`` pixel canvas.

    Parameters
    ----------
    width, height : int
        Size in CSS pixels.
    label : str
        Accessible name of the graphic (``aria-label`` of the SVG), plain text.
    background : str
        Fill of the whole canvas, ``#rrggbb``.
    """

    def __init__(self, width: int, height: int, label: str = "", background: str = "#fbfaf8"):
        self.width, self.height, self.label, self.background = int(width), int(height), str(label), background
        self.items: list[tuple] = []

    def rect(self, x: float, y: float, w: float, h: float, fill: str | None = None, stroke: str | None = None,
             width: float = 1.0, opacity: float = 1.0, dash: tuple[float, float] | None = None) -> None:
        self.items.append(("rect", float(x), float(y), float(w), float(h), fill, stroke, width, opacity, dash))

    def line(self, points: Sequence[tuple[float, float]], stroke: str, width: float = 1.0, opacity: float = 1.0,
             dash: tuple[float, float] | None = None) -> None:
        clean = [(float(x), float(y)) for x, y in points if math.isfinite(x) and math.isfinite(y)]
        if len(clean) >= 2:
            self.items.append(("line", clean, stroke, width, opacity, dash))

    def polygon(self, points: Sequence[tuple[float, float]], fill: str, opacity: float = 1.0,
                stroke: str | None = None, width: float = 1.0) -> None:
        self.items.append(("polygon", [(float(x), float(y)) for x, y in points], fill, opacity, stroke, width))

    def circle(self, x: float, y: float, r: float, fill: str | None = None, stroke: str | None = None,
               width: float = 1.0, dash: tuple[float, float] | None = None, ry: float | None = None) -> None:
        self.items.append(("circle", float(x), float(y), float(r), float(r if ry is None else ry), fill, stroke,
                           width, dash))

    def text(self, x: float, y: float, text: str, size: int = 11, fill: str = "#26241f", anchor: str = "start",
             rotate: bool = False, bold: bool = False) -> None:
        """Plain text with its baseline at ``y``; ``rotate`` turns it 90 degrees anticlockwise."""
        self.items.append(("text", float(x), float(y), str(text), int(size), fill, anchor, rotate, bold))

    def image(self, x: float, y: float, w: float, h: float, rgba: np.ndarray, smooth: bool = False) -> None:
        """A uint8 (H, W, 4) raster stretched over the box."""
        self.items.append(("image", float(x), float(y), float(w), float(h), np.asarray(rgba, dtype=np.uint8), smooth))

    # ------------------------------------------------------------------ SVG
    def svg(self) -> str:
        """The drawing as a standalone SVG element (inline-able in HTML)."""
        label = html.escape(self.label, quote=True)
        parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{self.width}" height="{self.height}" '
                 f'viewBox="0 0 {self.width} {self.height}" role="img" aria-label="{label}" '
                 f'font-family="{FONT}">', f"<title>{html.escape(self.label)}</title>",
                 f'<rect x="0" y="0" width="{self.width}" height="{self.height}" fill="{self.background}"/>']
        parts += [_svg_item(item) for item in self.items]
        parts.append("</svg>")
        return "".join(parts)

    # ------------------------------------------------------------------ PNG
    def png(self, scale: int = 2) -> bytes:
        """The drawing rasterised by Pillow at ``scale`` pixels per CSS pixel."""
        size = (self.width * scale, self.height * scale)
        canvas = Image.new("RGB", size, hex_rgb(self.background))
        for item in self.items:
            _png_item(canvas, item, scale)
        buffer = io.BytesIO()
        canvas.save(buffer, format="PNG")
        return buffer.getvalue()


def _paint(fill: str | None, stroke: str | None, width: float, opacity: float = 1.0,
           dash: tuple[float, float] | None = None) -> str:
    out = f' fill="{fill or "none"}"'
    if stroke:
        out += f' stroke="{stroke}" stroke-width="{_num(width)}"'
    if dash:
        out += f' stroke-dasharray="{_num(dash[0])} {_num(dash[1])}"'
    if opacity < 1.0:
        out += f' opacity="{_num(opacity)}"'
    return out


def _svg_item(item: tuple) -> str:
    kind = item[0]
    if kind == "rect":
        _, x, y, w, h, fill, stroke, width, opacity, dash = item
        return f'<rect x="{_num(x)}" y="{_num(y)}" width="{_num(w)}" height="{_num(h)}"' \
               f'{_paint(fill, stroke, width, opacity, dash)}/>'
    if kind == "line":
        _, points, stroke, width, opacity, dash = item
        return f'<polyline points="{_points(points)}"{_paint(None, stroke, width, opacity, dash)} ' \
               f'stroke-linejoin="round"/>'
    if kind == "polygon":
        _, points, fill, opacity, stroke, width = item
        return f'<polygon points="{_points(points)}"{_paint(fill, stroke, width, opacity)}/>'
    if kind == "circle":
        _, x, y, rx, ry, fill, stroke, width, dash = item
        return f'<ellipse cx="{_num(x)}" cy="{_num(y)}" rx="{_num(rx)}" ry="{_num(ry)}"' \
               f'{_paint(fill, stroke, width, 1.0, dash)}/>'
    if kind == "text":
        _, x, y, text, size, fill, anchor, rotate, bold = item
        turn = f' transform="rotate(-90 {_num(x)} {_num(y)})"' if rotate else ""
        weight = ' font-weight="600"' if bold else ""
        return f'<text x="{_num(x)}" y="{_num(y)}" font-size="{size}" fill="{fill}" ' \
               f'text-anchor="{anchor}"{weight}{turn}>{html.escape(text)}</text>'
    _, x, y, w, h, rgba, smooth = item
    rendering = "auto" if smooth else "pixelated"
    return f'<image x="{_num(x)}" y="{_num(y)}" width="{_num(w)}" height="{_num(h)}" ' \
           f'preserveAspectRatio="none" style="image-rendering:{rendering}" href="{png_data_uri(rgba)}"/>'


def _rgba(colour: str | None, opacity: float = 1.0) -> tuple[int, int, int, int] | None:
    if colour is None:
        return None
    return (*hex_rgb(colour), int(round(255 * max(0.0, min(1.0, opacity)))))


def _dashed(points: list[tuple[float, float]], dash: tuple[float, float]) -> list[list[tuple[float, float]]]:
    """Split a polyline into its dashes (on, off lengths in the same units)."""
    pieces, current, on, left = [], [points[0]], True, dash[0]
    for (x0, y0), (x1, y1) in zip(points[:-1], points[1:]):
        length, done = math.hypot(x1 - x0, y1 - y0), 0.0
        while length - done > left:
            done += left
            t = done / length
            point = (x0 + t * (x1 - x0), y0 + t * (y1 - y0))
            if on:
                pieces.append(current + [point])
            current, on = [point], not on
            left = dash[0] if on else dash[1]
        left -= length - done
        current.append((x1, y1))
    if on and len(current) >= 2:
        pieces.append(current)
    return pieces


def _stroke(draw: ImageDraw.ImageDraw, points: list, colour: tuple, width: float, dash: tuple | None,
            scale: int) -> None:
    scaled = [(x * scale, y * scale) for x, y in points]
    for piece in _dashed(scaled, (dash[0] * scale, dash[1] * scale)) if dash else [scaled]:
        draw.line(piece, fill=colour, width=max(1, int(round(width * scale))), joint="curve")


def _font(size: int) -> ImageFont.ImageFont:
    return ImageFont.load_default(size=size)


def _png_text(canvas: Image.Image, item: tuple, scale: int) -> None:
    _, x, y, text, size, fill, anchor, rotate, _bold = item
    font = _font(size * scale)
    left, top, right, bottom = font.getbbox(text)
    ascent = font.getmetrics()[0] if hasattr(font, "getmetrics") else bottom
    tile = Image.new("RGBA", (max(1, right) + 2, max(1, bottom) + 2), (0, 0, 0, 0))
    ImageDraw.Draw(tile).text((0, 0), text, font=font, fill=hex_rgb(fill))
    shift = {"start": 0.0, "middle": 0.5, "end": 1.0}[anchor] * right
    if rotate:
        tile = tile.rotate(90, expand=True)
        at = (int(x * scale - ascent), int(y * scale - tile.height + shift))
    else:
        at = (int(x * scale - shift), int(y * scale - ascent))
    canvas.paste(tile, at, tile)


def _png_item(canvas: Image.Image, item: tuple, scale: int) -> None:
    draw = ImageDraw.Draw(canvas, "RGBA")
    kind = item[0]
    if kind == "rect":
        _, x, y, w, h, fill, stroke, width, opacity, dash = item
        box = [x * scale, y * scale, (x + w) * scale, (y + h) * scale]
        if fill:
            draw.rectangle(box, fill=_rgba(fill, opacity))
        if stroke:
            corners = [(x, y), (x + w, y), (x + w, y + h), (x, y + h), (x, y)]
            _stroke(draw, corners, _rgba(stroke, opacity), width, dash, scale)
    elif kind == "line":
        _, points, stroke, width, opacity, dash = item
        _stroke(draw, points, _rgba(stroke, opacity), width, dash, scale)
    elif kind == "polygon":
        _, points, fill, opacity, stroke, width = item
        draw.polygon([(px * scale, py * scale) for px, py in points], fill=_rgba(fill, opacity))
        if stroke:
            _stroke(draw, points + points[:1], _rgba(stroke), width, None, scale)
    elif kind == "circle":
        _, x, y, rx, ry, fill, stroke, width, dash = item
        if fill:
            draw.ellipse([(x - rx) * scale, (y - ry) * scale, (x + rx) * scale, (y + ry) * scale], fill=_rgba(fill))
        if stroke:
            ring = [(x + rx * math.cos(a), y + ry * math.sin(a)) for a in np.linspace(0, 2 * math.pi, 73)]
            _stroke(draw, ring, _rgba(stroke), width, dash, scale)
    elif kind == "text":
        _png_text(canvas, item, scale)
    else:
        _, x, y, w, h, rgba, smooth = item
        size = (max(1, int(round(w * scale))), max(1, int(round(h * scale))))
        tile = Image.fromarray(rgba, "RGBA").resize(size, Image.BILINEAR if smooth else Image.NEAREST)
        canvas.paste(tile, (int(round(x * scale)), int(round(y * scale))), tile)


def save_drawing(drawing: Drawing, path: str | os.PathLike) -> Path:
    """Write a drawing as ``.svg`` or as ``.png`` (Pillow, twice the CSS pixel size), atomically."""
    target = Path(path)
    suffix = target.suffix.lower()
    if suffix == ".svg":
        payload = ('<?xml version="1.0" encoding="UTF-8"?>\n' + drawing.svg() + "\n").encode("utf-8")
    elif suffix == ".png":
        payload = drawing.png()
    else:
        raise ValueError(f"path must end in .svg or .png; got {str(path)!r}")
    atomic_write(target, payload)
    return target
