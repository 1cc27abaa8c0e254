"""The module layout from the thermal ortho: tables, module lattices, and layout checks.

- :mod:`.segment`: glass against ground on a decimated mosaic, table candidates;
- :mod:`.lattice`: each table refined on full-resolution pixels and its lattice fitted;
- :mod:`.detect`: :func:`detect_layout`, ids and GeoDataFrames;
- :mod:`.check`: :func:`check_layout` and :func:`corrected_layout` against an existing layout.
"""
from pvscan.measure.layout_image.check import KEEP_COLUMNS, LayoutCheck, check_layout, corrected_layout
from pvscan.measure.layout_image.detect import LAYOUT_COLUMNS, DetectedLayout, detect_layout

__all__ = ["detect_layout", "DetectedLayout", "LAYOUT_COLUMNS", "check_layout", "corrected_layout",
           "LayoutCheck", "KEEP_COLUMNS"]
