"""Locating the ES modules and CSS shipped in ``jostle/js``.

In a wheel, ``js/`` is installed as ``jostle/js`` beside ``jostle/widgets``; in an editable
install it is the repository's top-level ``js/``, also one level above ``widgets/``.
"""
from __future__ import annotations

from pathlib import Path

_JS_DIR = Path(__file__).resolve().parent.parent / "js"


def asset_path(name: str) -> Path:
    """Path of a file in the js folder; raises FileNotFoundError naming what is missing."""
    path = _JS_DIR / name
    if not path.is_file():
        raise FileNotFoundError(f"jostle's front-end file {name!r} is missing from {_JS_DIR}; reinstall jostle")
    return path


def read_asset(name: str) -> str:
    return asset_path(name).read_text(encoding="utf-8")


def canvas_module(name: str, *helpers: str) -> str:
    """A canvas view's ES module as served: the shared helpers of ``_canvas_helpers.js``
    (wire arrays, theme colours) and any of the view's own ``helpers`` placed ahead of its source."""
    return "\n".join(read_asset(part) for part in ("_canvas_helpers.js", *helpers, name))
