"""Assemble ``report.html``: one self-contained page (inline CSS, base64 PNGs, no script, no
external URL) from a result folder and, when available, the thermal ortho.

The content is gathered as plain data (``_sections``, ``_shots``, the figures) and written by
the Jinja2 templates in ``templates/`` with autoescaping on: no markup is assembled here. The
page depends only on the result folder, the ortho and the settings (no clock), so the same
inputs give the same file.
"""
from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pvscan._typing import ProgressFn
from pvscan.errors import PvscanError
from pvscan.report import _figures as figs
from pvscan.report import _sections as sec
from pvscan.report._geometry import MapGeometry, as_list
from pvscan.report._images import Palette, figure_palette, module_window, png_data_uri, quantise_rgb
from pvscan.report._raster import OverviewDone, OverviewRead, ThermalView, open_thermal
from pvscan.report._registration import registration_detail
from pvscan.report._result import SEVERITIES, ResultData, detection_limit, get_path, load_result, validity_checks
from pvscan.report._series import series_plot
from pvscan.report._shots import card_shots
from pvscan.report._text import DEFECT_TEXT, SAFETY_CAUTIONS, cautions, defect_name, fmt, isnum, period

log = logging.getLogger(__name__)

__all__ = ["build_report", "write_report", "read_overview_ahead", "SAFETY_CAUTIONS", "DEFECT_TEXT"]


# kept importable under their former names
_MapGeometry = MapGeometry
_period = period


def _environment() -> Any:
    import jinja2

    env = jinja2.Environment(loader=jinja2.PackageLoader("pvscan.report", "templates"),
                             autoescape=True, undefined=jinja2.StrictUndefined,
                             trim_blocks=True, lstrip_blocks=True, keep_trailing_newline=True)
    env.filters["fmt"] = fmt
    return env


# ---------------------------------------------------------------------- thermal source
def _ortho_spec_and_paths(data: ResultData, flight: Any, override: Any = None) -> tuple[list[Path], Any]:
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


def _open_view(data: ResultData, orthos: Any, flight: Any, notes: list[str], ortho_paths: Any = None,
               overview: OverviewRead | OverviewDone | None = None) -> tuple[ThermalView | None, Any]:
    """(ThermalView or None, ortho set to close or None)."""
    if orthos is not None:
        return ThermalView(orthos, overview), None
    paths, spec = _ortho_spec_and_paths(data, flight, ortho_paths)
    if not paths:
        notes.append("No thermal ortho is named in summary.json: the map shows module temperatures "
                     "and the cards show no thermal crops.")
        return None, None
    missing = [p for p in paths if not Path(p).exists()]
    if missing:
        notes.append(f"Thermal ortho not found ({Path(missing[0]).name}): the map shows module temperatures "
                     "and the cards show no thermal crops. Run `pvscan report` where the flight's files are.")
        log.warning("report: ortho %s not found; drawing without thermal pixels", missing[0])
        return None, None
    try:
        oset = open_thermal(paths, spec)
    except (PvscanError, OSError, ValueError) as exc:
        notes.append(f"Thermal ortho not readable ({exc}): the map shows module temperatures.")
        log.warning("report: ortho not readable: %s", exc)
        return None, None
    return ThermalView(oset, overview), oset


def read_overview_ahead(flight: Any, settings: Mapping | None, executor: Any) -> OverviewRead | None:
    """Start reading the report's ortho overview of ``flight`` on ``executor`` (a thread
    pool), for :func:`write_report` (``overview=``) later; None when the flight names no
    ortho. The same tiles and units as the report opens for ``flight``."""
    if flight is None or not list(flight.flight.orthos):
        return None
    cfg = _settings(settings)
    return OverviewRead(list(flight.flight.orthos), flight.ortho, int(cfg["overview_max_px"]), executor)


# ---------------------------------------------------------------------- settings
def _settings(settings: Mapping | None) -> dict:
    from pvscan.io.settings import load_pipeline

    base = dict(load_pipeline()["report"])
    if settings is not None:
        part = settings["report"] if "report" in settings and isinstance(settings["report"], Mapping) else settings
        base.update(dict(part))
    return base


def build_report(result_dir: str | Path, *, orthos: Any = None, modules: Any = None, flight: Any = None,
                 settings: Mapping | None = None, ortho_paths: Any = None,
                 progress: ProgressFn | None = None, overview: OverviewRead | OverviewDone | None = None) -> str:
    """The report of a result folder as one HTML string (see :func:`write_report`)."""
    cfg = _settings(settings)
    data = load_result(result_dir)
    notes: list[str] = []
    view, own = _open_view(data, orthos, flight, notes, ortho_paths, overview)
    try:
        return _build(data, view, modules, cfg, notes, progress, flight)
    finally:
        if own is not None:
            own.close()


# ---------------------------------------------------------------------- the overview map
def _overview(data: ResultData, view: ThermalView | None, geo: MapGeometry, cfg: dict, palette: Palette,
              progress: ProgressFn | None) -> tuple[bytes, list, tuple[float, float], bool]:
    """(map PNG, pins (priority, fx, fy), site colour window [degC], drawn on the ortho)."""
    an = data.anomalies
    mb = geo.bounds()
    image = None
    if view is not None:
        image, extent = view.overview(int(cfg["overview_max_px"]), progress=progress)
        finite = image[np.isfinite(image)]
        pct = np.percentile(finite, cfg["overview_percentiles"]) if finite.size else (math.nan, math.nan)
        site_window = (float(pct[0]), float(pct[1]))
        extent_view = extent
        if mb is not None:  # frame the plant, not the whole ortho
            pad = 0.04 * max(mb[2] - mb[0], mb[3] - mb[1])
            ev = (max(extent[0], mb[0] - pad), min(extent[1], mb[2] + pad),
                  max(extent[2], mb[1] - pad), min(extent[3], mb[3] + pad))
            if ev[1] > ev[0] and ev[3] > ev[2]:
                extent_view = ev
        img_label = "apparent temperature (ortho) [°C]"
    else:
        site_window = (math.nan, math.nan)
        ev = (mb[0], mb[2], mb[1], mb[3]) if mb is not None else (0, 1, 0, 1)
        pad = 0.04 * max(ev[1] - ev[0], ev[3] - ev[2], 1.0)
        extent_view = (ev[0] - pad, ev[1] + pad, ev[2] - pad, ev[3] + pad)
        img_label = "module median temperature [°C]"
    tmed = data.modules["t_median_c"].to_numpy(dtype=float) if len(data.modules) else np.array([])
    if not (isnum(site_window[0]) and isnum(site_window[1])):  # module temperatures: level on the median
        site_window = (module_window(tmed, percentile_hi=float(cfg["overview_percentiles"][1]),
                                     median_level=float(cfg["crop_median_level"]),
                                     max_rise=float(cfg["crop_max_rise_k"]), min_span=float(cfg["crop_min_span_k"]))
                       if tmed.size else (0.0, 1.0))
        if not isnum(site_window[0]):
            site_window = (0.0, 1.0)
    points = []
    for k, r in an.iterrows():
        g = geo.anomalies[k] if k < len(geo.anomalies) else None
        if g is None or g.is_empty:
            mg = geo.module_geoms(r)
            g = mg[0] if mg else None
        if g is not None and not g.is_empty:
            c = g.centroid
            sev = r["severity"] if r["severity"] in SEVERITIES else "monitor"
            points.append((c.x, c.y, sev, int(r["priority"]) if isnum(r["priority"]) else k + 1))
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
    rgb = figs.overview_rgb(
        pins=pins, extent=extent_view, image=image, module_geoms=geo.rings,
        module_values=tmed if image is None else None, anomaly_points=points,
        anomaly_regions=[(g, r["severity"]) for g, (_, r) in zip(geo.anomalies, an.iterrows())],
        cmap=palette.name, vmin=site_window[0], vmax=site_window[1], north_deg=geo.north_deg(),
        dpi=int(cfg["plot_dpi"]), n_labels=int(cfg["overview_labels"]), image_label=img_label)
    png = quantise_rgb(rgb, figure_palette(palette.name, accents=[figs.SEVERITY_STYLE[s]["color"] for s in SEVERITIES],
                                           inks=(figs.INK, figs.MUTED, "#000000")))
    return png, pins, site_window, image is not None


def _plots(data: ResultData, checks: list[dict], dpi: int) -> list[dict[str, str]]:
    an = data.anomalies
    sev_of_module: dict[str, str] = {}
    for _, r in an.iterrows():
        for mid in as_list(r.get("module_ids")) or [str(r["module_id"])]:
            sev = r["severity"] if r["severity"] in SEVERITIES else "monitor"
            cur = sev_of_module.get(mid)
            if cur is None or SEVERITIES.index(sev) < SEVERITIES.index(cur):
                sev_of_module[mid] = sev
    tmed = data.modules["t_median_c"].to_numpy(dtype=float) if len(data.modules) else np.array([])
    msev = data.modules["module_id"].map(sev_of_module) if len(data.modules) else pd.Series(dtype=object)
    t_by = {s: tmed[(msev == s).to_numpy()] for s in SEVERITIES} if len(tmed) else {}
    healthy = tmed[msev.isna().to_numpy()] if len(tmed) else tmed
    dtn = data.modules["delta_t_norm_k"].to_numpy(dtype=float) if len(data.modules) else np.array([])
    a_dtn = {s: an.loc[an["severity"] == s, "delta_t_norm_k"].to_numpy(dtype=float) for s in SEVERITIES}
    lbd = data.loss_by_defect()
    return [
        {"uri": png_data_uri(figs.temperature_hist_png(healthy, t_by, dpi)), "alt": "module temperature distribution"},
        {"uri": png_data_uri(figs.delta_norm_hist_png(dtn, a_dtn, dpi)), "alt": "normalised delta T histogram"},
        {"uri": png_data_uri(figs.loss_by_defect_png(list(lbd.index), lbd["power_loss_w"].tolist(),
                                                     [int(c) for c in lbd["count"]],
                                                     lbd["energy_loss_kwh_per_year"].tolist(), dpi)),
         "alt": "loss by defect class"},
        {"uri": png_data_uri(figs.validity_png(checks, dpi)), "alt": "conditions against validity limits"},
    ]


def _cells(data: ResultData, flight: Any) -> tuple[int, int] | None:
    """(cells along the long side, cells across) of the flight's module, None when unknown."""
    spec = getattr(flight, "module", None)
    manifest = data.manifest_path()
    if spec is None and manifest is not None:
        try:
            from pvscan.io.manifest import load_flight

            spec = load_flight(manifest, check_files=False).module
        except PvscanError:
            spec = None
    try:
        return (int(spec.n_along), int(spec.cells_across)) if spec is not None else None
    except (AttributeError, TypeError, ValueError):
        return None


def _registration_figure(data: ResultData, geo: MapGeometry, dpi: int) -> str:
    """The registration fit drawn (a data URI), '' when nothing was measured."""
    reg = data.summary.get("registration")
    if not isinstance(reg, Mapping):
        return ""
    arrows = []
    for b in reg.get("blocks") or []:
        if isinstance(b, Mapping) and all(isnum(b.get(k)) for k in ("x", "y", "dx_m", "dy_m")):
            arrows.append((float(b["x"]), float(b["y"]), float(b["dx_m"]), float(b["dy_m"]),
                           "used" if b.get("used", True) else "not used"))
    tables = reg.get("tables")
    for t in tables if isinstance(tables, list) else []:
        if isinstance(t, Mapping) and all(isnum(t.get(k)) for k in ("x", "y", "dx_m", "dy_m")):
            arrows.append((float(t["x"]), float(t["y"]), float(t["dx_m"]), float(t["dy_m"]), "table"))
    if not arrows or not geo.modules:
        return ""
    return png_data_uri(figs.registration_png(geo.rings, arrows, data.layout_shift_m, dpi))


def _build(data: ResultData, view: ThermalView | None, modules_gdf: Any, cfg: dict, notes: list[str],
           progress: ProgressFn | None, flight: Any = None) -> str:
    from pvscan import __version__

    crs = view.crs if view is not None else (modules_gdf.crs if modules_gdf is not None else None)
    geo = MapGeometry(data, crs, modules_gdf)
    palette = Palette(str(cfg["colormap"]))
    dpi = int(cfg["plot_dpi"])
    an = data.anomalies
    totals = data.totals()
    checks, ok = validity_checks(data.summary)
    rules = sec.severity_rules(data.summary)

    cells = _cells(data, flight)
    overview, pins, site_window, on_ortho = _overview(data, view, geo, cfg, palette, progress)
    size = int(cfg["crop_px"] if len(an) <= int(cfg["many_anomalies"]) else cfg["crop_px_many"])
    shots = []
    for k, r in an.iterrows():
        ageom = geo.anomalies[k] if k < len(geo.anomalies) else None
        shots.append(card_shots(view, geo, r, ageom, palette, cfg, site_window, size, cells))
        if progress is not None:
            progress("report cards", k + 1, len(an))
    card_of = {int(r["priority"]) if isnum(r["priority"]) else k + 1: (k, r) for k, r in an.iterrows()}
    pin_links = []
    for prio, fx, fy in pins:
        if prio in card_of and 0.0 <= fx <= 1.0 and 0.0 <= fy <= 1.0:
            k, r = card_of[prio]
            pin_links.append({"href": f"#a{k + 1}", "left": f"{100 * fx:.2f}", "top": f"{100 * fy:.2f}",
                              "title": f"#{prio} {defect_name(r['defect'])} ({r['severity']}), {r['module_id']}"})
    valid = sec.validity(data.summary, checks, ok, detection_limit(data.summary, float(cfg["detection_limit_spreads"])))
    n_safety = int((an["severity"] == "safety").sum()) if len(an) else 0
    pipeline_name = Path(str(data.summary.get("pipeline") or "default")).name
    context = {
        "version": __version__,
        "title": f"{data.site_name} · thermographic inspection {data.flight_id}".strip(),
        "css": _css(palette),
        "head": sec.header(data, totals, ok, len(valid["failed"])),
        "validity": valid,
        "registration": sec.registration(data.summary, data.layout_shift_m),
        "registration_figure": _registration_figure(data, geo, dpi),
        "registration_detail": registration_detail(data.summary, data.modules, geo.modules, dpi,
                                                   rings=geo.rings),
        "n_safety": n_safety,
        "map": {"uri": png_data_uri(overview), "on_ortho": on_ortho, "pins": pin_links, "notes": notes},
        "counts": sec.counts(data),
        "worklist": sec.worklist(data),
        "cards": sec.cards(data, shots, rules),
        "sheets": sec.sheets(data, rules),
        "plots": _plots(data, checks, dpi),
        "series": series_plot(data, flight, checks, dpi),
        "conditions": sec.conditions(data),
        "inputs": sec.inputs(data),
        "artefacts": sec.artefacts(data),
        "gsd_cm": f"{float(data.summary['inputs']['gsd_m']) * 100:.1f}"
        if isnum(get_path(data.summary, "inputs.gsd_m")) else "",
        "method": sec.method(data.summary, rules),
        "cautions": cautions(data.summary.get("safety") or []),
        "pipeline": pipeline_name,
    }
    return _environment().get_template("report.html").render(**context)


def _css(palette: Palette) -> str:
    from importlib import resources

    css = (resources.files("pvscan.report") / "templates" / "report.css").read_text(encoding="utf-8")
    return css + f".ramp {{ background: {palette.css_gradient()}; }}\n"


def write_report(result_dir: str | Path, out_path: str | Path | None = None, *, orthos: Any = None,
                 modules: Any = None, flight: Any = None, stats: Any = None, settings: Mapping | None = None,
                 ortho_paths: Any = None, progress: ProgressFn | None = None,
                 overview: OverviewRead | OverviewDone | None = None) -> Path:
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
        registration of ``summary.json`` is applied to draw it on the image.
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
    overview : OverviewRead or OverviewDone, optional
        The ortho overview already being read in another thread (:func:`read_overview_ahead`)
        or made beforehand (:class:`~pvscan.report._raster.OverviewDone`); used when it was
        made from the orthos the report draws, at the size it draws.

    Returns
    -------
    Path
        The written file.
    """
    from pvscan.io.outputs import atomic_write

    del stats
    out = Path(out_path) if out_path is not None else Path(result_dir) / "report.html"
    text = build_report(result_dir, orthos=orthos, modules=modules, flight=flight, settings=settings,
                        ortho_paths=ortho_paths, progress=progress, overview=overview)
    atomic_write(out, text)
    log.info("report written to %s (%.1f MB)", out, len(text.encode("utf-8")) / 1e6)
    return out
