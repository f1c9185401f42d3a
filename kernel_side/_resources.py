"""Folders shipped beside the package: the demo notebooks (and, for widgets, js/).

In a wheel they are installed inside ``jostle/``; in an editable install they are the
repository's top-level folders, one level above ``kernel_side/``.
"""
from __future__ import annotations

from pathlib import Path

_HERE = Path(__file__).resolve().parent


def shipped_folder(name: str) -> Path:
    """``jostle/<name>`` in a wheel, or ``<repo>/<name>`` in an editable install."""
    for candidate in (_HERE / name, _HERE.parent / name):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(f"jostle's folder {name!r} is missing beside {_HERE}; reinstall jostle")


def demo_notebooks_dir() -> Path:
    return shipped_folder("demo_notebooks")
