"""Module layout: read, reproject, split tables, assign ids, build module-local frames.

A layout is a file of polygons (GeoJSON in RFC 7946 lon/lat or with a legacy ``crs``
member, GeoPackage, or Shapefile, in any CRS). Each polygon is either one module, used as
drawn, or a table (a feature with ``rows``/``cols`` properties, or any feature without a
``module_id`` when the manifest's ``[layout]`` gives rows and cols), split evenly into
rows x cols module footprints along the table's own axes, as seen from above.

Module-local frame
------------------
Every footprint is (close to) a rotated rectangle. Its frame maps local coordinates
``u`` (along the long side) and ``v`` (across the short side), both 0..1, to map
coordinates::

    (x, y) = (fx0, fy0) + u * (fux, fuy) + v * (fvx, fvy)      [m]

The frame is normalised so the module's *lower edge* (the side toward the azimuth the
modules face) is at ``u = 0`` (``lower_edge == "u"``: the long side runs up the slope,
e.g. portrait on a fixed-tilt table) or at ``v = 0`` (``lower_edge == "v"``: landscape),
and so that (U, V) is right-handed (counter-clockwise rings). Cells are
``(floor(u * n_along), floor(v * n_across))``; the bypass-diode substring is
``floor(v * bypass_diodes)``, a strip running the full length.

Ids
---
When the layout gives no ids: tables are ``T0001``, ``T0002`` ... in file order; modules
split from a table are ``<table_id>-R<row>-C<col>`` with row 1 the row at the lower-edge
side and col 1 the table end with the smallest easting (northing for tables running
north-south); loose module polygons without ``module_id`` are ``M00001`` ... in file order
and are grouped into tables of touching modules (``G0001`` ...).
"""
from __future__ import annotations

from pvscan.errors import LayoutWarning
from pvscan.io.layout.build import ELECTRICAL_IDS, MODULE_COLUMNS, build_modules
from pvscan.io.layout.fields import FIELD_NAMES, layout_fields
from pvscan.io.layout.frames import (
    FRAME_COLUMNS,
    frame_from_axes,
    frame_from_polygon,
    region_polygon,
    region_polygons,
    uv_to_xy,
    xy_to_uv,
)
from pvscan.io.layout.read import read_layout
from pvscan.io.layout.split import split_table

__all__ = [
    "read_layout",
    "build_modules",
    "frame_from_axes",
    "frame_from_polygon",
    "split_table",
    "region_polygon",
    "region_polygons",
    "uv_to_xy",
    "xy_to_uv",
    "layout_fields",
    "FIELD_NAMES",
    "FRAME_COLUMNS",
    "MODULE_COLUMNS",
    "ELECTRICAL_IDS",
    "LayoutWarning",
]
