"""``workorders.gpx``: the work orders as GPX 1.1 waypoints, for any phone map.

One waypoint per work order, in walking order (``walk_order``), named by its walking number
and module, its description giving priority, severity, defect, string / combiner box /
inverter and the action; plus one route through all of them in walking order. GPX is the
open exchange format of GPS devices and map apps (schema: topografix.com/GPX/1/1); GDAL
reads it as the layers ``waypoints`` and ``routes``.

References
----------
.. [1] TopoGrafix, "GPX 1.1 Schema Documentation", 2004. https://www.topografix.com/GPX/1/1/
"""
from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any
from xml.sax.saxutils import escape, quoteattr

import pandas as pd

from pvscan.io.writers.atomic import atomic_write

__all__ = ["GPX_NAMESPACE", "workorders_gpx", "write_workorders_gpx"]

GPX_NAMESPACE = "http://www.topografix.com/GPX/1/1"

_CAUTION = ("Live DC whenever light falls on the modules; hot surfaces. Work only by qualified "
            "persons under the local electrical codes and the site's safety rules.")


def _text(v: Any) -> str | None:
    if v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA:
        return None
    s = str(v).strip()
    return s or None


def _describe(rec: dict) -> str:
    parts = [f"priority {_text(rec.get('priority'))}", _text(rec.get("severity")), _text(rec.get("defect"))]
    where = [f"{label} {_text(rec.get(key))}" for key, label in (
        ("table_id", "table"), ("string_id", "string"), ("combiner_id", "combiner box"),
        ("inverter_id", "inverter")) if _text(rec.get(key))]
    head = " | ".join(p for p in parts if p)
    if where:
        head += " | " + ", ".join(where)
    action = _text(rec.get("action"))
    return f"{head}. {action}" if action else head


def workorders_gpx(table: pd.DataFrame, *, name: str | None = None) -> str:
    """GPX 1.1 document of a work-order table (:func:`~pvscan.io.writers.workorders.workorders_table`).

    Rows without a position (``lon``/``lat`` missing) are left out. Waypoints are in walking
    order; ``<type>`` holds the severity, ``<cmt>`` the defect and the module ids.
    """
    rows = [r for r in table.to_dict("records")
            if _text(r.get("lon")) is not None and _text(r.get("lat")) is not None]
    rows.sort(key=lambda r: (float(r["walk_order"]) if _text(r.get("walk_order")) else math.inf,
                             float(r["priority"]) if _text(r.get("priority")) else math.inf))
    title = name or " ".join(x for x in (_text(rows[0].get("site")) if rows else None,
                                         _text(rows[0].get("flight_id")) if rows else None) if x) or "pvscan"
    out = ['<?xml version="1.0" encoding="UTF-8"?>',
           f'<gpx version="1.1" creator="pvscan" xmlns="{GPX_NAMESPACE}" '
           'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance" '
           f'xsi:schemaLocation="{GPX_NAMESPACE} {GPX_NAMESPACE}/gpx.xsd">',
           "<metadata>",
           f"<name>{escape(title + ' work orders')}</name>",
           f"<desc>{escape(_CAUTION + ' Findings from thermal imaging: confirm each on site.')}</desc>",
           "</metadata>"]
    pts = []
    for r in rows:
        lat, lon = float(r["lat"]), float(r["lon"])
        label = f"{_text(r.get('walk_order')) or '?'} {_text(r.get('module_id')) or ''}".strip()
        pos = f"lat={quoteattr(repr(round(lat, 7)))} lon={quoteattr(repr(round(lon, 7)))}"
        comment = " ".join(x for x in (_text(r.get("defect")), _text(r.get("module_ids"))) if x)
        out.append(f"<wpt {pos}><name>{escape(label)}</name>"
                   f"<cmt>{escape(comment)}</cmt><desc>{escape(_describe(r))}</desc>"
                   f"<type>{escape(_text(r.get('severity')) or 'unknown')}</type></wpt>")
        pts.append(f"<rtept {pos}><name>{escape(label)}</name></rtept>")
    if pts:
        out.append("<rte><name>walking order</name>"
                   "<desc>Work orders in walking order: safety first, then repair, then monitor.</desc>")
        out.extend(pts)
        out.append("</rte>")
    out.append("</gpx>")
    return "\n".join(out) + "\n"


def write_workorders_gpx(path: str | os.PathLike, table: pd.DataFrame, *, name: str | None = None) -> Path:
    """Write :func:`workorders_gpx` of ``table`` to ``path`` atomically (UTF-8)."""
    return atomic_write(path, workorders_gpx(table, name=name))
