"""Jupyter widgets over jostle's compute objects.

Widget classes live one per file here; their views are ES modules in ``jostle/js``.
"""
from __future__ import annotations

from ._assets import asset_path, read_asset
from .explorer import Explorer
from .sweep_explorer import SweepExplorer

__all__ = ["Explorer", "SweepExplorer", "asset_path", "read_asset"]
