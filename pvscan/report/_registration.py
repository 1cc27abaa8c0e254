"""The registration of the layout on the ortho, drawn for the report.

What ``summary.json`` ``registration`` holds, as plain data for ``templates/_registration.html``:
the global placement (shift, rotation, scale about the site centre), how it was decided
(module evidence of the layout as drawn, of each proposal and of the placement used; the
one-pitch decision along and across the rows), the local refinement (tables refined and
rejected, residual corrections) and a plan of the site with the shift applied at the
centre and each refined table's own correction as an arrow (drawn longer than true, the
factor printed). Nothing here reads files: the result data and the placed module
geometries come from the report builder.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from pvscan.report._images import png_data_uri
from pvscan.report._text import fmt, isnum

__all__ = ["registration_detail", "table_arrows"]

#: what a registration status means, in the words of the report
STATUS_TEXT = {
    "ok": "the layout sits on the modules of the ortho",
    "ambiguous": ("a placement one module pitch away fits almost as well: findings may sit on the "
                  "neighbouring module (the result is marked not valid)"),
    "failed": "no placement put the layout on the modules (the result is marked not valid)",
    "not_run": "registration switched off: the layout was used as drawn",
}


def _num(v: Any, digits: int = 3) -> str:
    return f"{float(v):.{digits}f}" if isnum(v) else "–"


def _evidence_row(name: str, q: Mapping) -> dict[str, str]:
    ok = q.get("ok")
    return {"name": name, "evidence": _num(q.get("evidence")), "ratio_u": _num(q.get("ratio_u"), 2),
            "ratio_v": _num(q.get("ratio_v"), 2),
            "glass": (f"{float(q['glass_error_k']):+.1f} K" if isnum(q.get("glass_error_k")) else "–"),
            "ok": "yes" if ok is True else ("no" if ok is False else "–")}


def _row_key(v: Any) -> str:
    """A table row id as text, the same for 3, 3.0 and '3'."""
    try:
        return repr(float(v))
    except (TypeError, ValueError):
        return str(v)


def table_arrows(reg: Mapping, modules: Any, geoms: list) -> list[tuple[float, float, float, float, str]]:
    """(x, y, dx, dy, kind) of each refined table (kind 'table') and table row (kind 'row'): its
    correction [m] at the centre of its placed modules (``modules`` the result's module table
    with ``table_id`` and, for rows, ``table_row``; ``geoms`` their placed polygons in the same
    order)."""
    if modules is None or "table_id" not in modules:
        return []
    out: list[tuple[float, float, float, float, str]] = []
    for key, kind in (("tables", "table"), ("rows", "row")):
        records = reg.get(key)
        if not isinstance(records, list) or not records or (kind == "row" and "table_row" not in modules):
            continue
        ids = modules["table_id"].astype(str).tolist()
        if kind == "row":
            ids = [f"{t}|{_row_key(r)}" for t, r in zip(ids, modules["table_row"].tolist())]
        sums: dict[str, list[float]] = {}
        for gid, g in zip(ids, geoms):
            if g is None or g.is_empty:
                continue
            c = g.centroid
            acc = sums.setdefault(gid, [0.0, 0.0, 0.0])
            acc[0] += c.x
            acc[1] += c.y
            acc[2] += 1.0
        for t in records:
            if not isinstance(t, Mapping) or not (isnum(t.get("dx_m")) and isnum(t.get("dy_m"))):
                continue
            gid = str(t.get("table_id"))
            if kind == "row":
                gid += "|" + _row_key(t.get("table_row"))
            got = sums.get(gid)
            if got is None or got[2] == 0:
                continue
            out.append((got[0] / got[2], got[1] / got[2], float(t["dx_m"]), float(t["dy_m"]), kind))
    return out


def registration_detail(summary: Mapping[str, Any], modules: Any, geoms: list, dpi: int, *,
                        rings: Any = None) -> dict[str, Any] | None:
    """The registration section's content (None when ``summary.json`` has no registration).

    Returns
    -------
    dict
        ``status`` / ``status_text``, ``placement`` rows (label, value), ``evidence`` rows
        (drawn, proposals, used), ``pitch`` rows, ``local`` rows, ``figure`` (a PNG data URI
        or ''), ``n_tables`` and ``n_rows`` (arrows drawn).
    """
    reg = summary.get("registration")
    if not isinstance(reg, Mapping) or not reg:
        return None
    status = str(reg.get("status") or "")
    place: Mapping[str, Any] = reg["placement"] if isinstance(reg.get("placement"), Mapping) else {}
    shift = reg.get("layout_shift_m") or summary.get("layout_shift_m") or [0.0, 0.0]
    sx, sy = (float(shift[0]), float(shift[1])) if (
        isinstance(shift, (list, tuple)) and len(shift) == 2 and all(isnum(v) for v in shift)) else (0.0, 0.0)
    rows = [("shift at the site centre", f"{sx:+.3f} m east, {sy:+.3f} m north ({math.hypot(sx, sy):.3f} m)")]
    if isnum(place.get("rotation_deg")):
        rows.append(("rotation", fmt(place["rotation_deg"], 3, "°") + " (counter-clockwise on the map)"))
    if isnum(place.get("scale")):
        rows.append(("scale", f"{(float(place['scale']) - 1.0) * 100:+.3f} %"))
    c = place.get("centre")
    if isinstance(c, (list, tuple)) and len(c) == 2 and all(isnum(v) for v in c):
        rows.append(("about the point", f"{float(c[0]):.1f} E, {float(c[1]):.1f} N (ortho CRS)"))
    rows.append(("applied", "yes" if reg.get("applied") else "no (layout used as drawn)"))

    ev: Mapping[str, Any] = reg["evidence"] if isinstance(reg.get("evidence"), Mapping) else {}
    ev_rows = []
    if isinstance(ev.get("drawn"), Mapping):
        ev_rows.append(_evidence_row("layout as drawn", ev["drawn"]))
    for k, q in enumerate(ev.get("proposals") or [], 1):
        if isinstance(q, Mapping):
            r = _evidence_row(f"proposal {k}", q)
            if isinstance(q.get("shift_m"), (list, tuple)) and len(q["shift_m"]) == 2:
                r["name"] += (f" ({float(q['shift_m'][0]):+.2f}, {float(q['shift_m'][1]):+.2f}) m, "
                              f"{_num(q.get('rotation_deg'), 2)}°")
            ev_rows.append(r)
    if isinstance(ev.get("chosen"), Mapping):
        ev_rows.append(_evidence_row("placement used", ev["chosen"]))

    pitch = []
    p = ev.get("pitch")
    if isinstance(p, Mapping):
        pitch.append(("lowest evidence one module pitch away, over the placement's",
                      f"{_num(p.get('lowest_ratio'), 2)} (more than {_num(p.get('limit'), 2)} needed)"))
        pitch.append(("decisive", "yes" if p.get("decisive") else "no"))
        mv = p.get("moved_m")
        if isinstance(mv, (list, tuple)) and len(mv) == 2 and all(isnum(v) for v in mv) and any(mv):
            pitch.append(("moved by whole pitches", f"{float(mv[0]):+.2f} m east, {float(mv[1]):+.2f} m north"))

    local = []
    lo = reg.get("local")
    if isinstance(lo, Mapping):
        local = [("tables measured", str(lo.get("tables_measured", "–"))),
                 ("tables refined", str(lo.get("tables_refined", "–"))),
                 ("tables that took their neighbours' correction", str(lo.get("tables_from_neighbours", "–"))),
                 ("tables rejected by their neighbours", str(lo.get("tables_rejected", "–"))),
                 ("local residuals (rms / largest)",
                  f"{_num(lo.get('residual_rms_m'))} m / {_num(lo.get('residual_max_m'))} m"),
                 ("evidence without / with the local corrections",
                  f"{_num(lo.get('evidence_before'))} / {_num(lo.get('evidence_after'))}")]

    lr = reg.get("local_rows")
    if isinstance(lr, Mapping):
        local += [("table rows measured", str(lr.get("rows_measured", "–"))),
                  ("table rows refined", str(lr.get("rows_refined", "–"))),
                  ("rows rejected by their neighbours", str(lr.get("rows_rejected", "–"))),
                  ("row residuals (rms / largest)",
                   f"{_num(lr.get('residual_rms_m'))} m / {_num(lr.get('residual_max_m'))} m")]

    arrows = table_arrows(reg, modules, geoms)
    figure = ""
    if geoms:
        from pvscan.report import _figures as figs

        figure = png_data_uri(figs.registration_png(geoms if rings is None else rings, arrows, (sx, sy), dpi))
    return {"status": status or "unknown", "status_text": STATUS_TEXT.get(status, status),
            "message": str(reg.get("message") or ""), "placement": rows, "evidence": ev_rows, "pitch": pitch,
            "local": local, "figure": figure, "n_tables": sum(a[4] == "table" for a in arrows),
            "n_rows": sum(a[4] == "row" for a in arrows)}
