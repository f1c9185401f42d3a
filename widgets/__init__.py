"""Jupyter widgets over jostle's compute objects.

Widget classes live one per file here; their views are ES modules in ``jostle/js``.
"""
from __future__ import annotations

from ._assets import asset_path, read_asset
from .comparison import Comparison
from .explorer import Explorer
from .gradient_components import GradientComponents
from .image_explorer import ImageExplorer
from .sweep_explorer import SweepExplorer

__all__ = ["Comparison", "Explorer", "ImageExplorer", "SweepExplorer", "asset_path", "read_asset",
           "GradientComponents"]
