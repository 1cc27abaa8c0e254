"""Assemble ``report.html``: one self-contained page (inline CSS, base64 PNGs, no script,
no external URL) from a result folder and, when available, the thermal ortho."""
from __future__ import annotations

import datetime as _dt
import html
import logging
import math
import string
from collections.abc import Callable, Mapping
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pvscan.errors import PvscanError
from pvscan.report import _figures as figs
from pvscan.report._images import (Palette, colour_window, figure_palette, module_window, png_data_uri,
                                   quantise_png, render_crop)
from pvscan.report._raster import ThermalView, open_thermal
from pvscan.report._result import SEVERITIES, ResultData, get_path, load_result, validity_checks

log = logging.getLogger(__name__)

__all__ = ["build_report", "write_report", "SAFETY_CAUTIONS", "DEFECT_TEXT"]

ProgressFn = Callable[[str, int, int], None]

#: Cautions always printed, whatever summary.json carries (deferring to local rules).
SAFETY_CAUTIONS = (
    "PV modules and strings are live (DC) whenever light falls on them, even when the inverter or "
    "the string is disconnected: daylight alone energises them, and DC circuits cannot be switched "
    "off from the array side.",
    "Damaged connectors, junction boxes and bypass diodes can arc and start fires; DC arcs do not "
    "extinguish by themselves. Keep clear of smoking or charred components and follow the site's "
    "emergency procedure.",
    "Hot spots, junction boxes and modules in the sun can be hot enough to burn skin; let them cool "
    "or wear suitable protective equipment.",
    "Only qualified, authorised persons may open, test or repair PV electrical equipment, under the "
    "local electrical codes and the site's safety rules (lock-out, permits, PPE).",
    "Drone flights must follow the local aviation rules and the site's permissions; keep clear of "
    "people, overhead lines and operating machinery.",
    "The findings are estimates from thermal imaging: confirm each one on site, with suitable "
    "instruments, before acting on it.",
)

#: Plain description of each defect pattern (our own wording).
DEFECT_TEXT = {
    "hot_cell": "one cell clearly warmer than the rest of the module (cell crack, shading, "
                "mismatch or local shunt)",
    "several_hot_cells": "several separate hot cells in one module",
    "bypassed_substring": "one bypass-diode substring uniformly warm: its current no longer flows "
                          "through the string (diode conducting)",
    "several_bypassed_substrings": "two or more substrings of one module uniformly warm",
    "open_module": "the whole module uniformly warm: it delivers no power to the string",
    "open_string": "a run of modules of one string uniformly warm: the string is not producing",
    "pid": "warm modules toward one end of a string and cells warm at the frame edge: a pattern of "
           "potential-induced degradation",
    "soiling": "a warm band or patch at the lower edge where dirt collects",
    "junction_box": "a hot spot at the junction box (connection, soldering or diode fault)",
}


# ---------------------------------------------------------------------- formatting
def _e(value: Any) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _isnum(v: Any) -> bool:
    try:
        return v is not None and math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def _fmt(v: Any, digits: int = 1, unit: str = "", thousands: bool = False) -> str:
    if not _isnum(v):
        return "–"
    f = float(v)
    txt = f"{f:,.{digits}f}" if thousands else f"{f:.{digits}f}"
    return f"{txt}{(' ' + unit) if unit else ''}"


def _sig(v: Any, digits: int = 4) -> str:
    """A number with ``digits`` significant digits, without exponent for everyday magnitudes."""
    f = float(v)
    if f != 0 and (abs(f) >= 1e6 or abs(f) < 1e-3):
        return f"{f:.{digits - 1}e}"
    return f"{f:.{digits}g}"


def _defect_name(defect: Any) -> str:
    return str(defect or "unknown").replace("_", " ")


def _first_sentence(text: Any, limit: int = 140) -> str:
    """The first sentence of an action text (the full text is on the card)."""
    if not isinstance(text, str) or not text.strip():
        return ""
    t = text.strip()
    cut = t.find(". ")
    first = t[: cut + 1] if 0 < cut < limit else t
    return first if len(first) <= limit else first[: limit - 1].rstrip() + "…"


def _img(uri: str, alt: str, cls: str = "", style: str = "") -> str:
    c = f' class="{cls}"' if cls else ""
    s = f' style="{style}"' if style else ""
    return f'<img{c}{s} src="{uri}" alt="{_e(alt)}">'


def _template(name: str) -> str:
    return (resources.files("pvscan.report") / "templates" / name).read_text(encoding="utf-8")


# ---------------------------------------------------------------------- geometry
def _as_list(v: Any) -> list:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return []
    if isinstance(v, (list, tuple, np.ndarray)):
        return [str(x) for x in v]
    if isinstance(v, str) and v.strip():
        s = v.strip().strip("[]")
        return [p.strip().strip("'\"") for p in s.replace(";", ",").split(",") if p.strip()]
    return []


def _translate(geoms: np.ndarray, dx: float, dy: float) -> np.ndarray:
    """Geometries moved by (dx, dy) [m], all at once (the same coordinates as
    ``shapely.affinity.translate``, which goes one geometry at a time)."""
    import shapely

    if dx == 0 and dy == 0:
        return geoms
    return shapely.transform(geoms, lambda c: c + np.array([dx, dy]))


class _MapGeometry:
    """Module and anomaly geometries in the ortho (map) CRS, placed on the image
    (the layout shift of summary.json applied)."""

    def __init__(self, data: ResultData, crs, modules_gdf=None):
        import geopandas as gpd
        from shapely import STRtree

        dx, dy = data.layout_shift_m
        mods = data.modules
        geo = gpd.GeoSeries(list(mods["geometry"]) if len(mods) else [], crs="EPSG:4326")
        if crs is None:
            crs = geo.estimate_utm_crs() if len(geo) else "EPSG:3857"
        self.crs = crs
        geo = geo.to_crs(crs)
        if modules_gdf is not None and len(modules_gdf) and "module_id" in modules_gdf:
            gdf = modules_gdf if modules_gdf.crs is None else modules_gdf.to_crs(crs)
            own = dict(zip(gdf["module_id"].astype(str), gdf.geometry))
            geo = gpd.GeoSeries([own.get(mid, g) for mid, g in zip(mods["module_id"], geo)], crs=crs)
        self.modules = list(_translate(geo.to_numpy(), dx, dy)) if len(geo) else []
        self.module_index = {mid: i for i, mid in enumerate(mods["module_id"])} if len(mods) else {}
        an = data.anomalies
        ageo = gpd.GeoSeries(list(an["geometry"]) if len(an) else [], crs="EPSG:4326")
        self.anomalies = list(_translate(ageo.to_crs(crs).to_numpy(), dx, dy)) if len(an) else []
        self.tree = STRtree(self.modules) if self.modules else None

    def module_geoms(self, row: pd.Series) -> list:
        ids = _as_list(row.get("module_ids")) or [str(row.get("module_id"))]
        out = [self.modules[self.module_index[m]] for m in ids if m in self.module_index]
        return out

    def near(self, box) -> list:
        if self.tree is None:
            return []
        from shapely.geometry import box as _box

        idx = self.tree.query(_box(*box))
        return [self.modules[i] for i in idx]

    def bounds(self) -> tuple[float, float, float, float] | None:
        if not self.modules:
            return None
        import shapely

        geoms = np.asarray(self.modules, dtype=object)
        keep = ~shapely.is_missing(geoms)
        keep[keep] = ~shapely.is_empty(geoms[keep])
        b = shapely.bounds(geoms[keep])
        return (b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max())

    def north_deg(self) -> float:
        """True north, clockwise from map up at the site's centre [deg] (grid convergence)."""
        from pyproj import CRS, Transformer

        b = self.bounds()
        try:
            c = CRS.from_user_input(self.crs)
            if b is None or c.is_geographic:
                return 0.0
            fwd = Transformer.from_crs(c, "EPSG:4326", always_xy=True)
            inv = Transformer.from_crs("EPSG:4326", c, always_xy=True)
            x, y = 0.5 * (b[0] + b[2]), 0.5 * (b[1] + b[3])
            lon, lat = fwd.transform(x, y)
            x2, y2 = inv.transform(lon, lat + 0.001)
            return math.degrees(math.atan2(x2 - x, y2 - y))
        except Exception:  # an exotic CRS: grid north is as good a guess as any
            return 0.0


# ---------------------------------------------------------------------- thermal source
def _ortho_spec_and_paths(data: ResultData, flight, override=None) -> tuple[list[Path], Any]:
    if flight is not None:
        return (list(override) if override else list(flight.flight.orthos)), flight.ortho
    paths = [Path(p) for p in override] if override else data.ortho_paths()
    spec = get_path(data.summary, "inputs.ortho_spec", "inputs.ortho", default=None)
    manifest = data.manifest_path()
    if manifest is not None:
        try:
            from pvscan.io.manifest import load_flight

            fl = load_flight(manifest, check_files=False)
            spec = fl.ortho
            if not override and (not paths or not all(p.exists() for p in paths)):
                paths = list(fl.flight.orthos)
        except PvscanError as exc:
            log.info("manifest %s not usable for the report: %s", manifest, exc)
    return paths, (spec if not isinstance(spec, Mapping) else dict(spec))


def _open_view(data: ResultData, orthos, flight, notes: list[str], ortho_paths=None):
    """(ThermalView or None, ortho set to close or None)."""
    if orthos is not None:
        return ThermalView(orthos), None
    paths, spec = _ortho_spec_and_paths(data, flight, ortho_paths)
    if not paths:
        notes.append("No thermal ortho is named in summary.json: the map shows module temperatures "
                     "and the cards show no thermal crops.")
        return None, None
    missing = [p for p in paths if not Path(p).exists()]
    if missing:
        notes.append(f"Thermal ortho not found ({_e(missing[0])}): the map shows module temperatures "
                     "and the cards show no thermal crops. Run <code>pvscan report</code> where the "
                     "flight's files are.")
        log.warning("report: ortho %s not found; drawing without thermal pixels", missing[0])
        return None, None
    try:
        oset = open_thermal(paths, spec)
    except (PvscanError, OSError, ValueError) as exc:
        notes.append(f"Thermal ortho not readable ({_e(exc)}): the map shows module temperatures.")
        log.warning("report: ortho not readable: %s", exc)
        return None, None
    return ThermalView(oset), oset


# ---------------------------------------------------------------------- sections
def _period(start: str, end: str) -> str:
    """'14 Jun 2026, 10:40–11:25 (UTC+02:00)' from ISO 8601 times (as given when unparsable)."""
    try:
        t0 = _dt.datetime.fromisoformat(start)
    except (TypeError, ValueError):
        return " – ".join(x for x in (start, end) if x)
    try:
        t1 = _dt.datetime.fromisoformat(end) if end else None
    except (TypeError, ValueError):
        t1 = None
    if t1 is not None and t0.tzinfo is not None and t1.tzinfo is not None:
        t1 = t1.astimezone(t0.tzinfo)
    off = t0.strftime("%z")
    zone = f" (UTC{off[:3]}:{off[3:]})" if off else ""
    day = f"{t0.day} {t0.strftime('%b %Y')}"
    if t1 is None:
        return f"{day}, {t0:%H:%M}{zone}"
    if t1.date() == t0.date():
        fmt = "%H:%M:%S" if t1.strftime("%H:%M") == t0.strftime("%H:%M") else "%H:%M"
        return f"{day}, {t0.strftime(fmt)}–{t1.strftime(fmt)}{zone}"
    return f"{day} {t0:%H:%M} – {t1.day} {t1.strftime('%b %Y')} {t1:%H:%M}{zone}"


def _header(data: ResultData, totals: dict, valid_ok, now: str) -> str:
    sev = data.anomalies["severity"].value_counts() if len(data.anomalies) else pd.Series(dtype=int)
    period = _period(data.flight_start, data.flight_end)
    share = totals["plant_share"]
    share_txt = f" ({share * 100:.2f} % of plant)" if _isnum(share) else ""
    verdict = {True: ("ok", "within limits"), False: ("fail", "limits not met"),
               None: ("unknown", "not recorded")}[valid_ok]
    items = [
        ("modules inspected", f"{int(totals['n_modules']):,}", ""),
        ("anomalies", f"{int(totals['n_anomalies']):,}", ""),
        ("safety findings", f"{int(sev.get('safety', 0))}", "safety"),
        ("power loss at STC", _fmt(totals["power_loss_w"] / 1000.0, 2, "kW"), ""),
        ("energy loss" + (f" (~{totals['yearly_cost']:,.0f} {totals['currency']}/yr)"
                          if _isnum(totals["yearly_cost"]) and totals["currency"] else ""),
         _fmt(totals["energy_loss_kwh_per_year"] / 1000.0, 2, "MWh/yr"), ""),
    ]
    def _value(v: str) -> str:  # the unit in a smaller size
        num, _, unit = v.partition(" ")
        return f"{_e(num)} <small>{_e(unit)}</small>" if unit else _e(num)

    figs_html = "".join(f'<div class="figure {c}"><div class="v">{_value(v)}</div><div class="k">{_e(k)}</div></div>'
                        for k, v, c in items)
    figs_html += (f'<div class="figure"><div class="v"><span class="verdict {verdict[0]}">{verdict[1]}'
                  f'</span></div><div class="k">acquisition conditions</div></div>')
    return f"""<header class="top"><div class="page">
<div class="kicker">Thermographic inspection of a PV plant</div>
<h1>{_e(data.site_name)}</h1>
<div class="meta">Flight {_e(data.flight_id or '–')} · {_e(period or 'time not recorded')} · power loss
{_e(_fmt(totals['power_loss_w'], 0, 'W', True))}{_e(share_txt)} · report generated {_e(now)}</div>
<div class="figures">{figs_html}</div>
</div></header>
<nav class="toc"><div class="page"><a href="#overview">Site map</a><a href="#findings">Findings</a>
<a href="#worklist">Work list</a><a href="#cards">Anomaly cards</a><a href="#plots">Plots</a>
<a href="#conditions">Conditions</a><a href="#method">Method</a><a href="#safety">Safety</a></div></nav>"""


def _counts_section(data: ResultData) -> str:
    tab = data.counts()
    loss = data.loss_by_defect()
    if tab.empty:
        body = "<p>No anomalies were found on this flight.</p>"
    else:
        rows = []
        for defect, r in tab.iterrows():
            lr = loss.loc[defect] if defect in loss.index else None
            rows.append(
                f"<tr><td>{_e(_defect_name(defect))}</td>"
                + "".join(f'<td class="n">{int(r[s]) or ""}</td>' for s in SEVERITIES)
                + f'<td class="n"><b>{int(r["total"])}</b></td>'
                + f'<td class="n">{_fmt(lr["power_loss_w"] if lr is not None else None, 0, "", True)}</td>'
                + f'<td class="n">{_fmt(lr["energy_loss_kwh_per_year"] if lr is not None else None, 0, "", True)}</td></tr>')
        tot = tab[list(SEVERITIES)].sum()
        rows.append("<tr><th>all</th>" + "".join(f'<th class="n">{int(tot[s])}</th>' for s in SEVERITIES)
                    + f'<th class="n">{int(tab["total"].sum())}</th>'
                    + f'<th class="n">{_fmt(loss["power_loss_w"].sum(), 0, "", True)}</th>'
                    + f'<th class="n">{_fmt(loss["energy_loss_kwh_per_year"].sum(), 0, "", True)}</th></tr>')
        head = ("<tr><th>defect</th>" + "".join(f'<th class="n"><span class="chip {s}">{s}</span></th>'
                                                 for s in SEVERITIES)
                + '<th class="n">total</th><th class="n">power loss [W]</th><th class="n">energy [kWh/yr]</th></tr>')
        body = f'<table class="counts">{head}{"".join(rows)}</table>'
    glossary = "".join(f"<tr><td>{_e(_defect_name(k))}</td><td>{_e(v)}</td></tr>"
                       for k, v in DEFECT_TEXT.items()
                       if tab.empty or k in tab.index)
    return f"""<section id="findings"><h2>Findings</h2>
<p class="lead">Anomalies per defect class and severity. <b>Safety</b>: a fire or shock hazard, act now;
<b>repair</b>: lost power, schedule a repair; <b>monitor</b>: minor, check again at the next flight.
Power loss at standard test conditions (1000 W/m², 25 °C); an anomaly spanning several modules is counted once.</p>
<div class="two wide-left"><div>{body}</div><div><table><tr><th>defect</th><th>what the image shows</th></tr>{glossary}</table></div></div>
</section>"""


def _worklist_section(data: ResultData) -> str:
    an = data.anomalies
    if an.empty:
        return '<section id="worklist"><h2>Work list</h2><p>Nothing to do.</p></section>'
    rows = []
    for k, r in an.iterrows():
        prio = int(r["priority"]) if _isnum(r["priority"]) else k + 1
        rows.append(
            f'<tr><td class="n"><a class="ref" href="#a{k + 1}">{prio}</a></td>'
            f'<td><span class="chip {_e(r["severity"])}">{_e(r["severity"])}</span></td>'
            f'<td><code>{_e(r["module_id"])}</code></td><td>{_e(r.get("table_id"))}</td>'
            f'<td>{_e(_defect_name(r["defect"]))}</td>'
            f'<td class="n">{_fmt(r["delta_t_k"], 1)}</td><td class="n">{_fmt(r["delta_t_norm_k"], 1)}</td>'
            f'<td class="n">{_fmt(r["power_loss_w"], 0, "", True)}</td>'
            f'<td class="n">{_fmt(r["energy_loss_kwh_per_year"], 0, "", True)}</td>'
            f'<td class="act">{_e(_first_sentence(r.get("action")))}</td></tr>')
    head = ('<tr><th class="n">#</th><th>severity</th><th>module</th><th>table</th><th>defect</th>'
            '<th class="n">ΔT [K]</th><th class="n">ΔT norm [K]</th><th class="n">loss [W]</th>'
            '<th class="n">[kWh/yr]</th><th class="act">action</th></tr>')
    return f"""<section id="worklist"><h2>Work list</h2>
<p class="lead">All anomalies in priority order (1 first); the number links to the anomaly's card.
The same list is in <code>workorders.csv</code>.</p>
<div class="scroll"><table>{head}{''.join(rows)}</table></div></section>"""


def _card(k: int, r: pd.Series, shots: str) -> str:
    prio = int(r["priority"]) if _isnum(r["priority"]) else k + 1
    sev = str(r["severity"])
    pos = []
    if r.get("table_id") is not None and str(r.get("table_id")) not in ("", "nan", "None"):
        pos.append(f"table {r['table_id']}")
    if _isnum(r.get("table_row")):
        pos.append(f"row {int(float(r['table_row']))}")
    if _isnum(r.get("table_col")):
        pos.append(f"position {int(float(r['table_col']))}")
    ids = _as_list(r.get("module_ids"))
    span = f" + {len(ids) - 1} more modules" if len(ids) > 1 else ""
    lonlat = (f"{float(r['lat']):.6f}, {float(r['lon']):.6f}" if _isnum(r.get("lat")) and _isnum(r.get("lon"))
              else "–")
    others = _as_list(r.get("other_defects"))
    facts = [
        ("ΔT", _fmt(r["delta_t_k"], 1, "K")), ("ΔT norm", _fmt(r["delta_t_norm_k"], 1, "K")),
        ("t max", _fmt(r["t_max_c"], 1, "°C")), ("confidence", _fmt(r["confidence"], 2)),
        ("power loss", _fmt(r["power_loss_w"], 0, "W", True)),
        ("energy loss", _fmt(r["energy_loss_kwh_per_year"], 0, "kWh/yr", True)),
    ]
    if r.get("iec_class") not in (None, "") and not (isinstance(r.get("iec_class"), float)
                                                     and math.isnan(r.get("iec_class"))):
        facts.append(("class", str(r["iec_class"])))
    if others:
        facts.append(("also", ", ".join(_defect_name(o) for o in others)))
    dl = "".join(f"<dt>{_e(a)}</dt><dd>{_e(b)}</dd>" for a, b in facts)
    action = r.get("action")
    action_html = (f'<p class="action"><b>Action:</b> {_e(action)}</p>' if isinstance(action, str) and action
                   else "")
    return f"""<article class="card {_e(sev)}" id="a{k + 1}" data-priority="{prio}" data-anomaly="{_e(r['anomaly_id'])}">
<header><span class="prio">#{prio}</span><h3>{_e(_defect_name(r['defect']))}</h3><span class="chip {_e(sev)}">{_e(sev)}</span></header>
<div class="mid">{_e(r['module_id'])}{_e(span)} · {_e(r['anomaly_id'])}</div>
{shots}<p class="where"><span>{_e(", ".join(pos) or "position not recorded")}</span>
<span>lat, lon {_e(lonlat)}</span></p><dl class="facts">{dl}</dl>{action_html}</article>"""


def _shots(view: ThermalView | None, geo: _MapGeometry, r: pd.Series, ageom, palette: Palette, cfg,
           site_window: tuple[float, float], size: int) -> str:
    from affine import Affine
    from rasterio.features import geometry_mask

    mods = geo.module_geoms(r)
    if not mods:
        return ('<div class="shots"><div class="nocrop" style="flex:1">thermal crop unavailable '
                '(module not in the layout)</div></div>')
    b = np.array([g.bounds for g in mods + ([ageom] if ageom is not None and not ageom.is_empty else [])])
    x0, y0, x1, y1 = b[:, 0].min(), b[:, 1].min(), b[:, 2].max(), b[:, 3].max()
    m0 = mods[0].bounds
    mlen = max(m0[2] - m0[0], m0[3] - m0[1])
    pad = float(cfg["crop_margin"]) * mlen
    close_box = [x0 - pad, y0 - pad, x1 + pad, y1 + pad]
    w_box, h_box = close_box[2] - close_box[0], close_box[3] - close_box[1]
    if w_box > 2.5 * h_box:  # a run of modules: keep the close-up from becoming a thin strip
        grow = 0.5 * (w_box / 2.5 - h_box)
        close_box[1] -= grow
        close_box[3] += grow
    elif h_box > 2.5 * w_box:
        grow = 0.5 * (h_box / 2.5 - w_box)
        close_box[0] -= grow
        close_box[2] += grow
    close_box = tuple(close_box)
    cx, cy = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    half = 0.5 * max(float(cfg["context_scale"]) * mlen, 1.6 * max(x1 - x0, y1 - y0) + 2 * pad)
    ctx_box = (cx - half, cy - half, cx + half, cy + half)
    if view is None:  # a plan of the module and the region instead of thermal pixels
        from pvscan.report._images import render_schematic

        sev_rgb = tuple(int(figs.SEVERITY_STYLE.get(str(r["severity"]), figs.SEVERITY_STYLE["monitor"])
                            ["color"][i:i + 2], 16) for i in (1, 3, 5))
        regions = [ageom] if ageom is not None and not ageom.is_empty else []
        neigh = [g for g in geo.near(close_box) if not any(g is m for m in mods)]
        ext = (close_box[0], close_box[2], close_box[1], close_box[3])
        png = render_schematic(ext, size, modules=mods, neighbours=neigh, regions=regions, region_rgb=sev_rgb)
        return (f'<div class="shots" style="--crop:{size}px"><figure>'
                f'{_img(png_data_uri(png), "plan of the module and the affected region", "crop plan")}'
                '<figcaption>plan: affected region filled (no thermal ortho available)</figcaption>'
                '</figure></div>')
    close = view.crop(close_box)
    ctx = view.crop(ctx_box)
    if close is None or not np.isfinite(close[0]).any():
        return '<div class="shots"><div class="nocrop" style="flex:1">module outside the thermal ortho</div></div>'
    arr, ext = close
    tr = Affine((ext[1] - ext[0]) / arr.shape[1], 0.0, ext[0], 0.0, -(ext[3] - ext[2]) / arr.shape[0], ext[3])
    neigh = [g for g in geo.near(close_box) if not any(g is m for m in mods)]
    # the level comes from the neighbouring modules in view (else the module), the top from
    # the anomalous module(s)
    inside = ~geometry_mask(mods, out_shape=arr.shape, transform=tr, all_touched=False)
    around = (~geometry_mask(neigh, out_shape=arr.shape, transform=tr) & ~inside) if neigh else None
    if around is not None and np.isfinite(arr[around]).sum() >= 20:
        level_vals = arr[around]
    else:
        level_vals = arr[inside] if inside.any() else arr
    top_vals = arr[inside] if inside.any() else arr
    lo, hi = module_window(level_vals, top_values=top_vals, percentile_hi=float(cfg["crop_percentile_hi"]),
                           median_level=float(cfg["crop_median_level"]),
                           max_rise=float(cfg["crop_max_rise_k"]), min_span=float(cfg["crop_min_span_k"]))
    regions = [ageom] if ageom is not None and not ageom.is_empty else []
    png1 = render_crop(arr, ext, palette, lo, hi, size, modules=mods, neighbours=neigh, regions=regions)
    out = [(png1, "close-up", lo, hi)]
    if ctx is not None and np.isfinite(ctx[0]).any():
        carr, cext = ctx
        slo, shi = site_window
        if not (_isnum(slo) and _isnum(shi)):
            slo, shi = colour_window(carr, (1.0, 99.5), float(cfg["crop_min_span_k"]))
        neigh2 = [g for g in geo.near(ctx_box) if not any(g is m for m in mods)]
        png2 = render_crop(carr, cext, palette, slo, shi, size, modules=mods, neighbours=neigh2,
                           regions=regions)
        out.append((png2, "context, site window", slo, shi))
    figs_html = []
    for png, cap, a, bnd in out:
        figs_html.append(
            f'<figure>{_img(png_data_uri(png), cap + " thermal crop", "crop")}'
            f'<figcaption>{_e(cap)}<span class="scale">{_fmt(a, 1)}'
            f'<span class="ramp" title="colour scale"></span>{_fmt(bnd, 1)} °C</span></figcaption></figure>')
    return f'<div class="shots" style="--crop:{size}px">{"".join(figs_html)}</div>'


_UNITS = (("poa_global", "W/m²"), ("irradiance", "W/m²"), ("temp_", "°C"), ("_c", "°C"),
          ("wind", "m/s"), ("relative_humidity", "%"), ("_pct", "%"), ("duration_s", "s"),
          ("cloud_okta", "okta"), ("altitude_m", "m"))
_LABELS = {"poa_global": "plane-of-array irradiance (mean)", "temp_air": "air temperature (mean)",
           "wind_speed": "wind speed (mean)", "temp_sky": "sky temperature",
           "relative_humidity": "relative humidity", "poa_global_change_pct": "irradiance change during flight",
           "poa_global_w_m2": "plane-of-array irradiance (mean)", "temp_air_c": "air temperature (mean)",
           "wind_speed_m_s": "wind speed (mean)", "temp_sky_c": "sky temperature",
           "relative_humidity_pct": "relative humidity"}


def _unit_of(key: str) -> str:
    k = key.split(".")[-1]
    if k.endswith(("_std", "_min", "_max")) and k.startswith("poa_global"):
        return "W/m²"
    for frag, unit in _UNITS:
        if frag in k:
            return unit
    return ""


def _label_of(key: str) -> str:
    k = key.split(".")[-1]
    if k in _LABELS:
        return _LABELS[k]
    label = key
    for suffix in ("_pct", "_s", "_c", "_m", "_w_m2", "_k"):
        if label.endswith(suffix):
            label = label[: -len(suffix)]
            break
    return label.replace("_", " ").replace(".", " · ")


def _series_plot(data: ResultData, flight, checks: list[dict], dpi: int) -> str:
    """The weather series of the flight against the limits, as an <img>; '' when unavailable."""
    series = None
    if flight is not None:
        series = getattr(flight.conditions, "series", None)
    else:
        manifest = data.manifest_path()
        if manifest is not None:
            try:
                from pvscan.io.manifest import load_flight

                series = load_flight(manifest, check_files=False).conditions.series
            except PvscanError:
                series = None
    if series is None or not Path(series).exists():
        return ""
    try:
        df = pd.read_csv(series)
        times = pd.to_datetime(df["time"], utc=True)
    except (OSError, KeyError, ValueError, pd.errors.ParserError) as exc:
        log.info("weather series %s not plotted: %s", series, exc)
        return ""

    def col(*names):
        for n in names:
            if n in df:
                return pd.to_numeric(df[n], errors="coerce").to_numpy(dtype=float)
        return np.full(len(df), np.nan)

    def limit(kind: str, *words: str):
        for c in checks:
            name = str(c["name"]).lower()
            if c["kind"] == kind and any(w in name for w in words) and _isnum(c["limit"]):
                return float(c["limit"])
        return None

    def when(text: str):
        try:
            return pd.Timestamp(text).tz_convert("UTC") if text else None
        except (ValueError, TypeError):
            return None

    start, end = when(data.flight_start), when(data.flight_end)
    tz = None
    try:
        tz = _dt.datetime.fromisoformat(data.flight_start).tzinfo
    except (TypeError, ValueError):
        pass
    if tz is not None:
        times = times.dt.tz_convert(tz)
        start = start.tz_convert(tz) if start is not None else None
        end = end.tz_convert(tz) if end is not None else None
    png = figs.conditions_series_png(
        list(times), col("poa_irradiance_w_m2", "poa_global"), col("wind_m_s", "wind_speed"),
        poa_min=limit("min", "irradiance", "poa"), wind_max=limit("max", "wind"),
        start=start, end=end, dpi=dpi)
    return _img(png_data_uri(png), "irradiance and wind during the flight", "map")


def _conditions_section(data: ResultData, checks: list[dict], ok, series_img: str = "") -> str:
    cond = data.summary.get("conditions") or {}
    rows = []

    def walk(prefix: str, obj: Any, depth: int = 0) -> None:
        if isinstance(obj, Mapping) and depth < 2:
            for k, v in obj.items():
                if k == "validity":
                    continue
                walk(f"{prefix}{k}" if not prefix else f"{prefix}.{k}", v, depth + 1)
        elif isinstance(obj, (str, int, float, bool)) or obj is None:
            unit = _unit_of(prefix)
            if isinstance(obj, float):
                val = _fmt(obj, 1 if abs(obj) >= 10 else 2, unit)
            else:
                val = "–" if obj is None else (f"{obj} {unit}".strip() if isinstance(obj, int) else str(obj))
            rows.append(f"<tr><td>{_e(_label_of(prefix))}</td><td>{_e(val)}</td></tr>")
        elif isinstance(obj, list) and len(obj) <= 6:
            rows.append(f"<tr><td>{_e(prefix.replace('_', ' '))}</td><td>{_e(', '.join(map(str, obj)))}</td></tr>")

    walk("", cond)
    if rows:
        half = (len(rows) + 1) // 2
        head = "<tr><th>quantity</th><th>value</th></tr>"
        cond_html = (f'<div class="two"><table>{head}{"".join(rows[:half])}</table>'
                     f'<table>{head if len(rows) > 1 else ""}{"".join(rows[half:])}</table></div>')
    else:
        cond_html = "<p>No conditions recorded.</p>"
    if checks:
        crow = []
        for c in checks:
            st = {True: '<span class="verdict ok">pass</span>', False: '<span class="verdict fail">fail</span>',
                  None: '<span class="verdict unknown">n/a</span>'}[c["passed"]]
            lim = ("≥ " if c["kind"] == "min" else "≤ " if c["kind"] == "max" else "") + _e(
                _sig(c["limit"]) if _isnum(c["limit"]) else (c["limit"] if c["limit"] is not None else "–"))
            val = _sig(c["value"]) if _isnum(c["value"]) else ("–" if c["value"] is None else c["value"])
            crow.append(f"<tr><td>{_e(str(c['name']).replace('_', ' '))}</td><td class='n'>{_e(val)}</td>"
                        f"<td class='n'>{lim}</td><td>{_e(c['unit'])}</td><td>{st}</td>"
                        f"<td class='note'>{_e(c['source'])}{(' · ' + _e(c['note'])) if c['note'] else ''}</td></tr>")
        checks_html = ("<table><tr><th>check</th><th class='n'>value</th><th class='n'>limit</th><th>unit</th>"
                       f"<th>result</th><th>source</th></tr>{''.join(crow)}</table>")
    else:
        checks_html = "<p>No acquisition-validity record in summary.json.</p>"
    verdict = {True: ("ok", "All acquisition limits were met: the temperature differences are comparable "
                            "with the reference conditions."),
               False: ("fail", "Some acquisition limits were not met: temperature differences and "
                               "classifications are less certain (confidences were lowered); consider a "
                               "repeat flight in better conditions."),
               None: ("unknown", "The validity of the acquisition conditions was not recorded.")}[ok]
    verdict_word = {"ok": "valid", "fail": "limits not met", "unknown": "unknown"}[verdict[0]]
    dx, dy = data.layout_shift_m
    reg = data.summary.get("registration") or {}
    reg_txt = ""
    if isinstance(reg, Mapping) and reg:
        bits = [f"{k.replace('_', ' ')}: {v:.3g}" if isinstance(v, float) else f"{k.replace('_', ' ')}: {v}"
                for k, v in reg.items() if isinstance(v, (str, int, float, bool))][:8]
        reg_txt = " (" + "; ".join(bits) + ")" if bits else ""
    gsd = get_path(data.summary, "inputs.gsd_m")
    gsd_txt = f" Ground sampling distance {_fmt(gsd * 100, 1, 'cm/px')}." if _isnum(gsd) else ""
    return f"""<section id="conditions" class="sheet"><h2>Acquisition conditions and validity</h2>
<p class="lead"><span class="verdict {verdict[0]}">{verdict_word}</span>
{_e(verdict[1])}</p>
<h3>Checks against the acquisition limits</h3>{checks_html}
<p class="note">The plot of these checks is under <a class="ref" href="#plots">Plots</a>.</p>
<h3>Conditions during the flight</h3>{series_img}{cond_html}
<h3>Inputs</h3>{_inputs_table(data)}
<p class="note">Layout shift applied to fit the ortho: {dx:+.2f} m east, {dy:+.2f} m north{_e(reg_txt)}.{_e(gsd_txt)}
Result geometries keep the layout's own positions; the map and crops draw them shifted onto the image.</p>
{_artefacts_note(data)}
</section>"""


def _artefacts_note(data: ResultData) -> str:
    """One note on the row stretches levelled as image artefacts (mosaic seams, reflections)."""
    art = data.summary.get("image_artefacts") or {}
    if not isinstance(art, Mapping) or not art.get("levelling"):
        return ""
    stretches = art.get("stretches") or []
    if not stretches:
        return ("<p class='note'>Image artefacts: no stretch of a table row was levelled (none stepped up "
                "and back down across a string boundary or in both rows of a table).</p>")
    items = []
    for s in stretches[:12]:
        mods = s.get("modules") or []
        span = f"{mods[0]} to {mods[-1]}" if len(mods) > 1 else (mods[0] if mods else "?")
        why = {"strings": "crosses a string boundary", "rows": "repeats in the table's other row"}.get(s.get("reason"), "")
        items.append(f"<li>{_e(span)} ({len(mods)} modules): {_sig(s.get('offset_k'))} K, {_e(why)}</li>")
    more = f"<li>... {len(stretches) - 12} more in summary.json</li>" if len(stretches) > 12 else ""
    return (f"<p class='note'>Image artefacts: the temperatures of {int(art.get('levelled_modules') or 0)} modules "
            "were levelled before any reference was taken, because a stretch of their row stepped up and back "
            "down as a whole (a mosaic seam or a reflection, not a defect of one string):</p>"
            f"<ul class='note'>{''.join(items)}{more}</ul>")


def _inputs_table(data: ResultData) -> str:
    inp = data.summary.get("inputs") or {}
    rows = []

    def add(label: str, value: Any) -> None:
        if value is None or value == "" or value == []:
            return
        if isinstance(value, (list, tuple)):
            value = ", ".join(Path(str(v)).name for v in value)
        rows.append(f"<tr><td>{_e(label)}</td><td><code>{_e(value)}</code></td></tr>")

    add("flight manifest", Path(str(inp["manifest"])).name if inp.get("manifest") else None)
    add("thermal ortho", data.ortho_paths() or inp.get("files"))
    add("layout", Path(str(inp["layout"])).name if inp.get("layout") else None)
    add("map CRS", inp.get("crs"))
    if _isnum(inp.get("gsd_m")):
        add("ground sampling distance", f"{float(inp['gsd_m']) * 100:.1f} cm/px")
    missing = inp.get("modules_without_data")
    if isinstance(missing, list) and missing:
        add("modules outside the ortho", f"{len(missing)} ({', '.join(map(str, missing[:5]))}"
                                         f"{' ...' if len(missing) > 5 else ''})")
    add("pipeline", Path(str(data.summary["pipeline"])).name if data.summary.get("pipeline") else "default")
    add("pvscan version", data.summary.get("pvscan_version"))
    return f"<table>{''.join(rows)}</table>" if rows else "<p>Not recorded.</p>"


def _method_section(data: ResultData) -> str:
    u0 = get_path(data.summary, "normalisation.u0", "thermal.u0", "radiometry.u0", default=25.0)
    u1 = get_path(data.summary, "normalisation.u1", "thermal.u1", "radiometry.u1", default=6.84)
    return f"""<section id="method"><h2>Method notes</h2><div class="method">
<h3>Radiometry</h3><p>The thermal ortho holds <i>apparent</i> temperatures, as the camera export wrote them
with its own emissivity and reflected temperature. pvscan converts them to true glass temperatures through
band radiance (Planck's law integrated over the camera band), using the glass emissivity, the radiance of the
sky reflected by the glass and the atmosphere's transmission. All temperatures and ΔT values in tables and
cards are true glass temperatures; the images show the apparent temperatures of the ortho
(their colour scale is in camera °C).</p>
<h3>Reference and normalisation</h3><p>Each module is compared with a local reference: the median temperature
of its healthy neighbours (same table row first, else nearby modules), so irradiance drift, cloud shadows and
seams between flight lines do not create false alarms. ΔT is the affected region's temperature minus the
reference (95th percentile for spot patterns, median for area patterns). The normalised ΔT scales ΔT to
1000 W/m² and 1 m/s wind with the Faiman heat-loss coefficient U = u0 + u1·v
(u0 = {_e(u0)} W/(m²·K), u1 = {_e(u1)} W·s/(m³·K)): ΔT<sub>norm</sub> = ΔT · (1000 / G) · U(v) / U(1 m/s).</p>
<h3>Classification and severity</h3><p>Defect patterns are recognised in the module's own frame (along and across
the cells, substrings of the bypass diodes, the junction box position), independent of how the module lies on the
map. The conditions follow the outdoor-thermography guidance of IEC TS 62446-3 (minimum irradiance, wind,
stable sky, image resolution); when a limit is not met, confidences are lowered.</p>
<h3>Power and energy loss</h3><p>Electrical patterns take their electrical consequence: a bypassed substring loses
its share of the nameplate power, an open module all of it, an open string every module of the run. Partial and
diffuse patterns are estimated from their thermal deficit against the heat an open module would shed
(η·G/U), spot patterns from a heat balance of the affected area, each bounded by the substring's share.
Energy loss = power loss × the site's specific yield (kWh/kWp per year). Losses are estimates for
prioritising work, not a warranty or yield assessment.</p>
<p class="note">Priorities put safety findings first, then order the work by lost energy, then by
confidence.
Positions: table, row (1 = lower edge) and position along the table (1 = the end with the smallest
coordinate along the table's axis).</p>
</div></section>"""


def _safety_section(data: ResultData) -> str:
    extra = [str(s) for s in (data.summary.get("safety") or []) if isinstance(s, str)]
    items = list(SAFETY_CAUTIONS)
    seen = {s.split(";")[0][:40].lower() for s in items}
    for s in extra:
        if s.split(";")[0][:40].lower() not in seen and s not in items:
            items.append(s)
    lis = "".join(f"<li>{_e(s)}</li>" for s in items)
    return f"""<section id="safety"><h2>Safety cautions</h2>
<p class="lead">Read before any site visit. Local electrical codes, aviation rules and the site's own safety
rules take precedence over anything in this report.</p><ul class="cautions">{lis}</ul></section>"""


# ---------------------------------------------------------------------- main
def _settings(settings: Mapping | None) -> dict:
    from pvscan.io.settings import load_pipeline

    base = dict(load_pipeline()["report"])
    if settings is not None:
        sec = settings["report"] if "report" in settings and isinstance(settings["report"], Mapping) else settings
        base.update(dict(sec))
    return base


def build_report(result_dir: str | Path, *, orthos=None, modules=None, flight=None,
                 settings: Mapping | None = None, ortho_paths=None,
                 progress: ProgressFn | None = None) -> str:
    """The report of a result folder as one HTML string (see :func:`write_report`)."""
    cfg = _settings(settings)
    data = load_result(result_dir)
    notes: list[str] = []
    view, own = _open_view(data, orthos, flight, notes, ortho_paths)
    try:
        return _build(data, view, modules, cfg, notes, progress, flight)
    finally:
        if own is not None:
            own.close()


def _build(data: ResultData, view, modules_gdf, cfg: dict, notes: list[str], progress, flight=None) -> str:
    from pvscan import __version__

    crs = view.crs if view is not None else (modules_gdf.crs if modules_gdf is not None else None)
    geo = _MapGeometry(data, crs, modules_gdf)
    palette = Palette(str(cfg["colormap"]))
    dpi = int(cfg["plot_dpi"])
    an = data.anomalies
    totals = data.totals()
    checks, ok = validity_checks(data.summary)

    # ---- overview
    mb = geo.bounds()
    image = None
    if view is not None:
        image, extent = view.overview(int(cfg["overview_max_px"]), progress=progress)
        finite = image[np.isfinite(image)]
        site_window = (tuple(float(v) for v in np.percentile(finite, cfg["overview_percentiles"]))
                       if finite.size else (math.nan, math.nan))
        if mb is not None:  # frame the plant, not the whole ortho
            pad = 0.04 * max(mb[2] - mb[0], mb[3] - mb[1])
            extent_view = (max(extent[0], mb[0] - pad), min(extent[1], mb[2] + pad),
                           max(extent[2], mb[1] - pad), min(extent[3], mb[3] + pad))
            if extent_view[1] <= extent_view[0] or extent_view[3] <= extent_view[2]:
                extent_view = extent
        else:
            extent_view = extent
        img_label = "apparent temperature (ortho) [°C]"
    else:
        site_window = (math.nan, math.nan)
        extent_view = (mb[0], mb[2], mb[1], mb[3]) if mb is not None else (0, 1, 0, 1)
        pad = 0.04 * max(extent_view[1] - extent_view[0], extent_view[3] - extent_view[2], 1.0)
        extent_view = (extent_view[0] - pad, extent_view[1] + pad, extent_view[2] - pad, extent_view[3] + pad)
        img_label = "module median temperature [°C]"
    tmed = data.modules["t_median_c"].to_numpy(dtype=float) if len(data.modules) else np.array([])
    if not (_isnum(site_window[0]) and _isnum(site_window[1])):  # module temperatures: level on the median
        site_window = (module_window(tmed, percentile_hi=float(cfg["overview_percentiles"][1]),
                                     median_level=float(cfg["crop_median_level"]),
                                     max_rise=float(cfg["crop_max_rise_k"]), min_span=float(cfg["crop_min_span_k"]))
                       if tmed.size else (0.0, 1.0))
        if not _isnum(site_window[0]):
            site_window = (0.0, 1.0)
    points = []
    for k, r in an.iterrows():
        g = geo.anomalies[k] if k < len(geo.anomalies) else None
        if g is None or g.is_empty:
            mg = geo.module_geoms(r)
            g = mg[0] if mg else None
        if g is not None and not g.is_empty:
            c = g.centroid
            prio = int(r["priority"]) if _isnum(r["priority"]) else k + 1
            sev = r["severity"] if r["severity"] in SEVERITIES else "monitor"
            points.append((c.x, c.y, sev, prio))
    if image is not None:
        xmin, xmax, ymin, ymax = extent
        h, w = image.shape
        c0 = int(max(0, math.floor((extent_view[0] - xmin) / (xmax - xmin) * w)))
        c1 = int(min(w, math.ceil((extent_view[1] - xmin) / (xmax - xmin) * w)))
        r0 = int(max(0, math.floor((ymax - extent_view[3]) / (ymax - ymin) * h)))
        r1 = int(min(h, math.ceil((ymax - extent_view[2]) / (ymax - ymin) * h)))
        px_w, px_h = (xmax - xmin) / w, (ymax - ymin) / h
        image = image[r0:r1, c0:c1]
        extent_view = (xmin + c0 * px_w, xmin + c1 * px_w, ymax - r1 * px_h, ymax - r0 * px_h)
    pins: list = []
    overview = figs.overview_png(
        pins=pins, extent=extent_view, image=image, module_geoms=geo.modules,
        module_values=tmed if image is None else None, anomaly_points=points,
        anomaly_regions=[(g, r["severity"]) for g, (_, r) in zip(geo.anomalies, an.iterrows())],
        cmap=palette.name,
        vmin=site_window[0], vmax=site_window[1], north_deg=geo.north_deg(), dpi=dpi,
        n_labels=int(cfg["overview_labels"]), image_label=img_label)
    overview = quantise_png(overview, figure_palette(
        palette.name, accents=[figs.SEVERITY_STYLE[s]["color"] for s in SEVERITIES],
        inks=(figs.INK, figs.MUTED, "#000000")))

    # ---- cards
    size = int(cfg["crop_px"] if len(an) <= int(cfg["many_anomalies"]) else cfg["crop_px_many"])
    cards = []
    for k, r in an.iterrows():
        ageom = geo.anomalies[k] if k < len(geo.anomalies) else None
        shots = _shots(view, geo, r, ageom, palette, cfg, site_window, size)
        cards.append(_card(k, r, shots))
        if progress is not None:
            progress("report cards", k + 1, len(an))

    # ---- plots
    sev_of_module: dict[str, str] = {}
    for _, r in an.iterrows():
        for mid in _as_list(r.get("module_ids")) or [str(r["module_id"])]:
            sev = r["severity"] if r["severity"] in SEVERITIES else "monitor"
            cur = sev_of_module.get(mid)
            if cur is None or SEVERITIES.index(sev) < SEVERITIES.index(cur):
                sev_of_module[mid] = sev
    msev = data.modules["module_id"].map(sev_of_module) if len(data.modules) else pd.Series(dtype=object)
    t_by = {s: tmed[(msev == s).to_numpy()] for s in SEVERITIES} if len(tmed) else {}
    healthy = tmed[msev.isna().to_numpy()] if len(tmed) else tmed
    p_temp = figs.temperature_hist_png(healthy, t_by, dpi)
    dtn = data.modules["delta_t_norm_k"].to_numpy(dtype=float) if len(data.modules) else np.array([])
    a_dtn = {s: an.loc[an["severity"] == s, "delta_t_norm_k"].to_numpy(dtype=float) for s in SEVERITIES}
    p_dtn = figs.delta_norm_hist_png(dtn, a_dtn, dpi)
    lbd = data.loss_by_defect()
    p_loss = figs.loss_by_defect_png(list(lbd.index), lbd["power_loss_w"].tolist(),
                                     [int(c) for c in lbd["count"]], lbd["energy_loss_kwh_per_year"].tolist(), dpi)
    p_valid = png_data_uri(figs.validity_png(checks, dpi))

    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    notes_html = "".join(f'<p class="note">{n}</p>' for n in notes)
    sev_counts = an["severity"].value_counts() if len(an) else pd.Series(dtype=int)
    n_safety = int(sev_counts.get("safety", 0))
    notice = ("<strong>Safety.</strong> " + (f"{n_safety} finding(s) are a possible fire or shock hazard. "
                                             if n_safety else "")
              + "PV arrays are live whenever light falls on them, even when disconnected; hot spots can burn. "
                "Work on site only by qualified persons under local electrical codes; drone flights only "
                'under local aviation rules. See <a class="ref" href="#safety">safety cautions</a>.')
    card_of = {int(r["priority"]) if _isnum(r["priority"]) else k + 1: (k, r) for k, r in an.iterrows()}
    pin_links = []
    for prio, fx, fy in pins:
        if prio in card_of and 0.0 <= fx <= 1.0 and 0.0 <= fy <= 1.0:
            k, r = card_of[prio]
            tip = f"#{prio} {_defect_name(r['defect'])} ({r['severity']}), {r['module_id']}"
            pin_links.append(f'<a class="pin" href="#a{k + 1}" title="{_e(tip)}" '
                             f'style="left:{100 * fx:.2f}%;top:{100 * fy:.2f}%"></a>')
    pins_html = "".join(pin_links)
    if view is not None:
        cards_lead = ("One card per anomaly in priority order. Left: close-up of the module, colour window fitted "
                      "to the neighbouring modules (they sit in the lower third), the affected region outlined in "
                      '<b style="color:#1aa6c9">cyan</b> and the module in white. Right: the surroundings in the '
                      "site-wide colour window, for context. Images show the ortho's apparent temperatures.")
    else:
        cards_lead = ("One card per anomaly in priority order, with a plan of the module and its affected region "
                      "(no thermal ortho was available for crops).")
    body = [
        _header(data, totals, ok, now),
        '<main class="page">',
        f'<div class="notice">{notice}</div>',
        f'''<section id="overview"><h2>Site map</h2>
<p class="lead">{'Thermal orthomosaic' if image is not None else 'Module temperatures'} with module outlines;
anomalies marked by severity, the first {int(cfg["overview_labels"])} labelled with their priority;
each mark links to its card.</p>
<div class="mapwrap">{_img(png_data_uri(overview), "site overview map", "map")}{pins_html}</div>{notes_html}</section>''',
        _counts_section(data),
        _worklist_section(data),
        f'''<section id="cards" class="sheet"><h2>Anomaly cards</h2>
<p class="lead">{cards_lead}</p>
<div class="cards">{''.join(cards) if cards else '<p>No anomalies.</p>'}</div></section>''',
        f'''<section id="plots"><h2>Plots</h2><div class="plots">
{_img(png_data_uri(p_temp), "module temperature distribution")}{_img(png_data_uri(p_dtn), "normalised delta T histogram")}
{_img(png_data_uri(p_loss), "loss by defect class")}{_img(p_valid, "conditions against validity limits")}
</div></section>''',
        _conditions_section(data, checks, ok, _series_plot(data, flight, checks, dpi)),
        _method_section(data),
        _safety_section(data),
        f'<footer>pvscan {_e(__version__)} · result folder <code>{_e(data.result_dir.name)}</code> · '
        f'pipeline <code>{_e(Path(str(data.summary.get("pipeline") or "default")).name)}</code></footer>',
        "</main>",
    ]
    title = f"{data.site_name} · thermographic inspection {data.flight_id}".strip()
    return string.Template(_template("report.html")).substitute(
        title=_e(title), css=_template("report.css") + f".ramp {{ background: {palette.css_gradient()}; }}\n",
        body="\n".join(body), version=_e(__version__))


def write_report(result_dir: str | Path, out_path: str | Path | None = None, *, orthos=None, modules=None,
                 flight=None, stats=None, settings: Mapping | None = None, ortho_paths=None,
                 progress: ProgressFn | None = None) -> Path:
    """Write the self-contained inspection report ``report.html``.

    Parameters
    ----------
    result_dir : path-like
        A result folder (``modules.geojson``, ``anomalies.geojson``, ``workorders.csv``,
        ``summary.json``).
    out_path : path-like, optional
        Where to write; default ``result_dir / "report.html"``.
    orthos : OrthoSet, optional
        The open thermal ortho (``pvscan.io.ortho.open_orthos``); left open. Without it the
        orthos of ``flight`` or of ``summary.json`` (``inputs.files``, ``inputs.manifest``)
        are opened; when none is readable the map shows module temperatures instead.
    modules : geopandas.GeoDataFrame, optional
        The modules frame in the ortho CRS, in the layout's positions (as drawn); the
        layout shift of ``summary.json`` is applied to draw it on the image.
    flight : pvscan.io.manifest.Flight, optional
        The flight (for its orthos and their units).
    stats : optional
        Accepted from the pipeline and not used: the report reads the result files.
    settings : mapping, optional
        The pipeline or its ``[report]`` section; missing keys take the defaults.
    ortho_paths : sequence of path-like, optional
        Ortho tiles to read instead of those named in ``summary.json`` (a result folder
        moved away from its flight); their units come from the flight manifest when
        ``summary.json`` names one that exists, else degC.
    progress : callable, optional
        ``progress(stage, done, total)``.

    Returns
    -------
    Path
        The written file.
    """
    from pvscan.io.outputs import atomic_write

    del stats
    out = Path(out_path) if out_path is not None else Path(result_dir) / "report.html"
    text = build_report(result_dir, orthos=orthos, modules=modules, flight=flight, settings=settings,
                        ortho_paths=ortho_paths, progress=progress)
    atomic_write(out, text)
    log.info("report written to %s (%.1f MB)", out, len(text.encode("utf-8")) / 1e6)
    return out
