"""Detect the module layout of a flight from its thermal ortho(s) and the module datasheet.

:func:`detect_layout` finds the tables on a decimated mosaic (:mod:`.segment`), fits a
lattice of module footprints to each on the full-resolution pixels (:mod:`.lattice`) and
returns one polygon per module in the ortho's CRS.

Ids (stable for a given image and documented in the README):

- tables are grouped into *table rows* (tables whose centres lie within half a table depth
  of each other across the table axis), numbered from the row furthest toward the facing
  direction (the lower edge side; the south-most row for south-facing tables), and within a
  row from the smallest coordinate along the table axis (easting; northing for tables running
  north-south): ``table_id = "D<table row:02d>-<table:02d>"``;
- inside a table, ``table_row`` 1 is the module row at the lower edge and ``table_col`` 1 the
  module at the table end with the smallest easting (northing for north-south tables), as in
  :mod:`pvscan.io.layout`; ``module_id = "<table_id>-R<row>-C<col:02d>"``.

A module whose footprint lies partly on nodata or beyond the ortho's edge has ``status`` "cut"
(its position is where the lattice puts it, the extent of the table beyond the image is not
guessed: modules wholly beyond it are not written); ``"nodata"`` when most of it is on
nodata; ``"ok"`` otherwise. ``confidence`` is the table's (0..1).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from pvscan.errors import LayoutError
from pvscan.io.settings import section
from pvscan.measure.layout_image.coverage import uncovered_glass
from pvscan.measure.layout_image.lattice import TableFit, facing_vector, fit_table
from pvscan.measure.layout_image.segment import TableCandidate, find_tables

__all__ = ["DetectedLayout", "detect_layout", "LAYOUT_COLUMNS"]

log = logging.getLogger(__name__)

#: Columns of the detected modules frame (besides geometry).
LAYOUT_COLUMNS = ("module_id", "table_id", "table_row", "table_col", "status", "confidence", "orientation")


@dataclass
class DetectedLayout:
    """The result of :func:`detect_layout`.

    Attributes
    ----------
    modules : geopandas.GeoDataFrame
        One row per module: ``LAYOUT_COLUMNS`` and the footprint polygon (ortho CRS).
    tables : geopandas.GeoDataFrame
        One row per table: ``table_id``, ``rows``, ``cols``, ``orientation``, ``confidence``,
        ``misfit``, ``angle_deg`` (of the table axis, counter-clockwise from east),
        ``module_along_m``, ``module_across_m``, ``contrast_k``, ``cut`` and the table polygon.
        ``status`` is ``"ok"``, or ``"check"`` below ``[layout_detect] check_confidence``.
    fits : list of TableFit
    dropped : geopandas.GeoDataFrame
        The lattices of at least ``min_table_modules`` modules fitted where the mosaic showed a
        table but not kept (``reason``: ``"confidence"`` below ``min_confidence`` or
        ``"misfit"`` above ``max_misfit``), that no kept table covers: the places where the
        detection was unsure and wrote no modules. Columns ``rows``, ``cols``,
        ``orientation``, ``confidence``, ``misfit``, ``reason`` and the outline polygon.
    coverage : dict, optional
        What the layout left out (:func:`.coverage.uncovered_glass`): ``uncovered_m2``,
        ``uncovered_modules``, ``uncovered_share``.
    """

    modules: Any
    tables: Any
    fits: list[TableFit]
    dropped: Any = None
    coverage: dict | None = None

    def summary(self) -> dict:
        """Counts for ``summary.json`` and the CLI.

        ``dropped_modules`` counts the modules of the lattices not kept (``dropped``);
        ``dropped_share`` is their share of all modules found and dropped [-] (lattices on
        shadows between rows count too, so it can be high on a right layout);
        ``uncovered_share`` is the share of the plant's glass no kept table covers
        (:func:`.coverage.uncovered_glass`): a detected layout with a large one has missed
        part of the plant.
        """
        m = self.modules
        d = self.dropped
        n_drop = int((d["rows"] * d["cols"]).sum()) if d is not None and len(d) else 0
        n_mod = int(len(m))
        return {
            "tables": int(len(self.tables)),
            "modules": n_mod,
            "modules_cut": int((m["status"] == "cut").sum()) if len(m) else 0,
            "modules_nodata": int((m["status"] == "nodata").sum()) if len(m) else 0,
            "confidence_min": float(self.tables["confidence"].min()) if len(self.tables) else None,
            "confidence_median": float(self.tables["confidence"].median()) if len(self.tables) else None,
            "tables_to_check": int((self.tables["status"] == "check").sum()) if len(self.tables) else 0,
            "dropped_tables": int(len(d)) if d is not None else 0,
            "dropped_modules": n_drop,
            "dropped_share": round(n_drop / (n_mod + n_drop), 4) if n_mod + n_drop else 0.0,
            **(self.coverage or {"uncovered_m2": None, "uncovered_modules": None, "uncovered_share": None}),
        }


def _consistent(fits: list[TableFit], contrast_share: float) -> list[TableFit]:
    """The fits that look like the plant's tables: the orientation most of the modules have
    (weighted by confidence), and a contrast (glass against ground, or of the frame-line comb)
    at least ``contrast_share`` of the median of those; a lattice fitted to textured ground
    or to a strip of a shadow fails one or the other."""
    if len(fits) < 3:
        return fits
    weight: dict[str, float] = {}
    for f in fits:
        weight[f.orientation] = weight.get(f.orientation, 0.0) + f.rows * f.cols * f.confidence
    major = max(weight, key=lambda k: weight[k])
    same = [f for f in fits if f.orientation == major]
    floor = contrast_share * float(np.median([f.contrast_k for f in same]))
    return [f for f in same if f.contrast_k >= floor]


def _outline(f: TableFit) -> Any:
    from shapely import polygons

    return polygons(np.array([f.origin, f.origin + f.length_m * f.axis,
                              f.origin + f.length_m * f.axis + f.depth_m * f.across, f.origin + f.depth_m * f.across]))


def _overlaps(a: TableFit, b: TableFit, share: float) -> bool:
    """Whether two fitted tables cover each other by more than ``share`` of the smaller one."""
    pa, pb = _outline(a), _outline(b)
    inter = pa.intersection(pb).area
    return inter > share * min(pa.area, pb.area)


def _remainders(cand: Any, fit: TableFit, module_width_m: float, clear_m: float) -> list[Any]:
    """Parts of a candidate the fitted table does not cover, to be searched again.

    Two tables whose gap the mosaic closed form one candidate (along a row, or rows across
    one another when the ground between them is as textured as the glass); the lattice
    takes one of them. The candidate's rectangle is cut into the strips beside the fitted
    table across the axis (full length) and the parts before and after it along the axis
    (within the fitted table's band), each starting ``clear_m`` [m] from the fitted table;
    each wider than the limits below is searched again.
    """
    from dataclasses import replace

    a = cand.axis
    n = np.array([-a[1], a[0]])
    c_fit = fit.origin + 0.5 * fit.length_m * fit.axis + 0.5 * fit.depth_m * fit.across
    rel = c_fit - cand.centre
    rel_s, rel_w = float(rel @ a), float(rel @ n)
    half_s = 0.5 * abs(fit.length_m * float(fit.axis @ a)) + 0.5 * abs(fit.depth_m * float(fit.across @ a))
    half_w = 0.5 * abs(fit.length_m * float(fit.axis @ n)) + 0.5 * abs(fit.depth_m * float(fit.across @ n))
    out = []
    lo_c, hi_c = -0.5 * cand.depth_m, 0.5 * cand.depth_m
    band_lo, band_hi = max(lo_c, rel_w - half_w), min(hi_c, rel_w + half_w)
    for lo, hi in ((lo_c, rel_w - half_w - clear_m), (rel_w + half_w + clear_m, hi_c)):
        if hi - lo > module_width_m:
            out.append(replace(cand, centre=cand.centre + 0.5 * (lo + hi) * n, depth_m=hi - lo))
    lo_c, hi_c = -0.5 * cand.length_m, 0.5 * cand.length_m
    band_c = cand.centre + 0.5 * (band_lo + band_hi) * n
    for lo, hi in ((lo_c, rel_s - half_s - clear_m), (rel_s + half_s + clear_m, hi_c)):
        if hi - lo > 2.0 * module_width_m:
            out.append(replace(cand, centre=band_c + 0.5 * (lo + hi) * a, length_m=hi - lo,
                               depth_m=max(band_hi - band_lo, module_width_m)))
    return out


def _joined(f: TableFit, g: TableFit, join: Mapping[str, float]) -> TableFit | None:
    """One table from two fits of one row of modules, or None when they are not that.

    A shadow or a seam across a table can split it into two candidates, each fitted to its
    part; the parts lie on one lattice: same orientation and rows, module sizes within
    ``join_size_m`` [m] and axes within ``join_axis_deg`` [deg], the same line across (within
    ``join_across_m`` [m]), and along the axis they overlap or leave at most ``join_gap_m`` [m]
    between them (tables of a row stand about a metre apart, common practice: two tables are
    never joined); ``join`` holds these ``[layout_detect]`` keys. The larger fit's lattice is
    run on, whole pitches, over the other's extent; the modules it adds keep the other fit's
    status and glass share.
    """
    from dataclasses import replace

    if f.cols < g.cols:
        f, g = g, f
    size_tol = float(join["join_size_m"])
    across_tol_m, gap_m = float(join["join_across_m"]), float(join["join_gap_m"])
    if (f.orientation != g.orientation or f.rows != g.rows or abs(f.module_s_m - g.module_s_m) > size_tol
            or abs(f.module_w_m - g.module_w_m) > size_tol
            or abs(float(f.axis @ g.axis)) < math.cos(math.radians(float(join["join_axis_deg"])))):
        return None
    pitch = f.module_s_m + f.gap_s_m
    g_axis = g.axis if float(f.axis @ g.axis) > 0 else -g.axis
    g_start = g.origin if float(f.axis @ g.axis) > 0 else g.origin + g.length_m * g.axis
    g_across = g_start if float(f.across @ g.across) > 0 else g_start + g.depth_m * g.across
    if abs(float((g_across - f.origin) @ f.across)) > across_tol_m:
        return None
    s0 = float((g_start - f.origin) @ f.axis)
    s1 = s0 + g.length_m * float(g_axis @ f.axis)
    if s0 > f.length_m + gap_m or s1 < -gap_m or (s0 >= -0.5 * pitch and s1 <= f.length_m + 0.5 * pitch):
        return None  # apart, or within the larger one (the overlap rule's case)
    before = max(0, int(round(-s0 / pitch)))
    after = max(0, int(round((s1 - f.length_m) / pitch)))
    cols = f.cols + before + after
    status = np.empty((f.rows, cols), dtype=object)
    glass = np.empty((f.rows, cols))
    g_flip = float(f.axis @ g.axis) < 0
    rows_g = slice(None) if float(f.across @ g.across) > 0 else slice(None, None, -1)
    for c in range(cols):
        if before <= c < before + f.cols:
            status[:, c], glass[:, c] = f.status[:, c - before], f.glass[:, c - before]
            continue
        k = int(np.clip(round(((c - before) * pitch - s0) / pitch), 0, g.cols - 1))
        k = g.cols - 1 - k if g_flip else k
        status[:, c], glass[:, c] = g.status[rows_g, k], g.glass[rows_g, k]
    n_f, n_g = f.rows * f.cols, g.rows * g.cols
    g_cut = (g.cut[1], g.cut[0]) if g_flip else (g.cut[0], g.cut[1])
    return replace(f, origin=f.origin - before * pitch * f.axis, length_m=cols * pitch - f.gap_s_m, cols=cols,
                   confidence=(f.confidence * n_f + g.confidence * n_g) / (n_f + n_g),
                   misfit=max(f.misfit, g.misfit), contrast_k=(f.contrast_k * n_f + g.contrast_k * n_g) / (n_f + n_g),
                   cut=(g_cut[0] if before else f.cut[0], g_cut[1] if after else f.cut[1], f.cut[2], f.cut[3]),
                   status=status, glass=glass)


def _join_rows(fits: list[TableFit], join: Mapping[str, float]) -> list[TableFit]:
    """Fits of one table's parts joined (:func:`_joined`, tolerances ``join``) until no two join."""
    out = list(fits)
    changed = True
    while changed:
        changed = False
        for i in range(len(out)):
            for j in range(i + 1, len(out)):
                m = _joined(out[i], out[j], join)
                if m is not None:
                    out = [f for k, f in enumerate(out) if k not in (i, j)] + [m]
                    changed = True
                    break
            if changed:
                break
    return out


def _axis_deg(f: TableFit) -> float:
    """Direction of a table's axis [deg, 0..180, counter-clockwise from east]."""
    return math.degrees(math.atan2(f.axis[1], f.axis[0])) % 180.0


def plant_axis_deg(fits: list[TableFit], tol_deg: float) -> float | None:
    """The direction most of the plant's modules share [deg, 0..180]: of the fits' own
    directions, the one with the most modules x confidence within ``tol_deg`` of it, averaged
    over those (weighted the same); None without fits. Tables of a plant are set out parallel
    (common practice), so one table's angle that differs is more often a wrong edge fit (a
    shadow or the ground along one long edge) than a turned table."""
    if not fits:
        return None
    ang = np.array([_axis_deg(f) for f in fits])
    wt = np.array([f.rows * f.cols * max(f.confidence, 1e-6) for f in fits])
    diff = (ang[None, :] - ang[:, None] + 90.0) % 180.0 - 90.0  # [i, j]: j relative to i
    near = np.abs(diff) <= tol_deg
    k = int(np.argmax((near * wt[None, :]).sum(axis=1)))
    return float((ang[k] + np.average(diff[k, near[k]], weights=wt[near[k]])) % 180.0)


def _turned_to(cand: TableCandidate, f: TableFit, axis_deg: float) -> TableCandidate:
    """The candidate of fit ``f`` (its centre and extent) with its axis at ``axis_deg``."""
    from dataclasses import replace

    a = math.radians(axis_deg)
    axis = np.array([math.cos(a), math.sin(a)])
    if axis @ f.axis < 0:
        axis = -axis
    centre = f.origin + 0.5 * f.length_m * f.axis + 0.5 * f.depth_m * f.across
    return replace(cand, centre=centre, axis=axis, length_m=f.length_m, depth_m=f.depth_m)


def _combine(fits: list[TableFit], cfg: dict, parts: Sequence[TableFit] = ()) -> list[TableFit]:
    """The plant's tables from all fits: those consistent with the plant (:func:`_consistent`),
    parts of one row joined (:func:`_join_rows`; before the overlap rule, which would keep
    the larger of two overlapping parts and lose the rest of the table), then of the fits
    covering each other by more than ``overlap_share`` the one with the larger confidence x
    sqrt(modules) (the same table found twice: a part is fitted on fewer frame lines), and
    the parts joined again. ``parts`` are sure fits of fewer than ``min_table_modules``
    modules: each is kept only as the part of a table it joins (a seam or a shadow across a
    table's end leaves a part of a few modules; alone it may be anything warm or cool)."""
    join = {k: float(cfg[k]) for k in ("join_across_m", "join_gap_m", "join_size_m", "join_axis_deg")}
    fits = _join_rows(_consistent(fits, float(cfg["plant_contrast_share"])), join)
    for part in parts:
        for i, f in enumerate(fits):
            m = _joined(f, part, join)
            if m is not None:
                fits[i] = m
                break
    fits.sort(key=lambda f: -f.confidence * math.sqrt(f.rows * f.cols))
    kept: list[TableFit] = []
    for f in fits:
        if not any(_overlaps(g, f, float(cfg["overlap_share"])) for g in kept):
            kept.append(f)
    return _join_rows(kept, join)


def _order(fits: list[TableFit], azimuth_deg: float) -> list[tuple[int, int, TableFit]]:
    """(table row, table, fit) numbered as the module docstring says."""
    if not fits:
        return []
    face = facing_vector(azimuth_deg)
    centres = np.array([f.origin + 0.5 * f.length_m * f.axis + 0.5 * f.depth_m * f.across for f in fits])
    axis = np.mean([f.axis for f in fits], axis=0)
    axis /= np.linalg.norm(axis)
    across = np.array([-axis[1], axis[0]])
    if across @ face < 0:
        across = -across
    w = centres @ across  # larger = further toward the lower edge side
    s = centres @ axis
    depth = float(np.median([f.depth_m for f in fits]))
    order = np.argsort(-w, kind="stable")
    row = np.zeros(len(fits), int)
    r, last = 0, None
    for i in order:
        if last is not None and last - w[i] > 0.5 * depth:
            r += 1
        row[i] = r
        last = w[i] if last is None else last if last - w[i] <= 0.5 * depth else w[i]
    out = []
    for rr in range(r + 1):
        members = np.flatnonzero(row == rr)
        east = axis[0] > 1e-9 or (abs(axis[0]) <= 1e-9 and axis[1] > 0)
        members = members[np.argsort(s[members] if east else -s[members], kind="stable")]
        for k, i in enumerate(members):
            out.append((rr + 1, k + 1, fits[i]))
    return out


def _frame(rows: list[dict], cols: list[str], crs: Any) -> Any:
    import geopandas as gpd

    return gpd.GeoDataFrame(rows, columns=cols, geometry="geometry", crs=crs) if rows else \
        gpd.GeoDataFrame({c: [] for c in cols}, geometry="geometry", crs=crs)


def _frames(rows: list[dict], tables: list[dict], crs: Any) -> tuple[Any, Any]:
    tcols = ["table_id", "rows", "cols", "orientation", "confidence", "status", "misfit", "angle_deg",
             "module_along_m", "module_across_m", "contrast_k", "cut", "geometry"]
    return _frame(rows, [*LAYOUT_COLUMNS, "geometry"], crs), _frame(tables, tcols, crs)


def _dropped(dropped: list[tuple[TableFit, str]], kept: list[TableFit], share: float, crs: Any) -> Any:
    """The dropped lattices no kept table (nor a larger dropped one) covers by more than
    ``share`` of the smaller, as a GeoDataFrame (:class:`DetectedLayout` ``dropped``)."""
    out: list[tuple[TableFit, str]] = []
    for f, reason in sorted(dropped, key=lambda fr: -fr[0].rows * fr[0].cols):
        if not any(_overlaps(g, f, share) for g in kept) and not any(_overlaps(g, f, share) for g, _ in out):
            out.append((f, reason))
    rows = [{"rows": f.rows, "cols": f.cols, "orientation": f.orientation, "confidence": round(f.confidence, 3),
             "misfit": round(f.misfit, 3), "reason": reason, "geometry": _outline(f)} for f, reason in out]
    return _frame(rows, ["rows", "cols", "orientation", "confidence", "misfit", "reason", "geometry"], crs)


def detect_layout(orthos: Any, module: Any, layout: Any, settings: Any = None, progress: Any = None) -> DetectedLayout:
    """Find every table and module footprint in the ortho.

    Parameters
    ----------
    orthos : OrthoSet
        The flight's open ortho tiles (apparent temperature [degC]).
    module : ModuleSpec
        Datasheet size ``width_m``, ``length_m`` [m].
    layout : LayoutSpec
        ``orientation`` (preferred on a tie), ``gap_m`` [m], ``tilt_deg`` [deg] (the side up
        the slope is seen as ``length * cos(tilt)``), ``azimuth_deg`` [deg] (which edge is
        the lower edge, row 1).
    settings : Pipeline or mapping, optional
        The pipeline; its ``[layout_detect]`` section is used.
    progress : callable, optional
        ``progress(stage, done, total)``.

    Returns
    -------
    DetectedLayout

    Raises
    ------
    LayoutError
        No table found in the ortho.
    """
    from shapely import polygons

    cfg = dict(section(settings, "layout_detect"))
    img, transform = orthos.read_overview(int(cfg["overview_px"]))
    step = abs(float(transform.a))
    if step > module.width_m / float(cfg["min_px_per_module"]):
        log.info("layout detection on a %.3f m/px mosaic (the ortho is larger than %d px)", step, cfg["overview_px"])
    cands = find_tables(img, transform, module.width_m, cfg)
    fits: list[TableFit] = []
    fitted: list[TableCandidate] = []  # the candidate of each fit
    dropped: list[tuple[TableFit, str]] = []
    parts: list[TableFit] = []  # sure fits smaller than a table
    queue = list(cands)
    k = 0
    while queue and k < 8 * len(cands) + 32:
        cand = queue.pop(0)
        k += 1
        fit = fit_table(orthos, cand, module, layout, cfg)
        if progress is not None:
            progress("layout_detect", k, k + len(queue))
        if fit is None:
            continue
        queue.extend(_remainders(cand, fit, module.width_m, float(cfg["remainder_clear_m"])))
        if fit.rows * fit.cols < int(cfg["min_table_modules"]):
            if fit.confidence >= float(cfg["min_confidence"]) and fit.misfit <= float(cfg["max_misfit"]):
                parts.append(fit)  # kept only as the part of a table it joins (_combine)
            continue
        if fit.confidence < float(cfg["min_confidence"]) or fit.misfit > float(cfg["max_misfit"]):
            log.info("table candidate at (%.1f, %.1f) dropped: confidence %.2f, misfit %.2f", *cand.centre,
                     fit.confidence, fit.misfit)
            dropped.append((fit, "confidence" if fit.confidence < float(cfg["min_confidence"]) else "misfit"))
            continue
        fits.append(fit)
        fitted.append(cand)
    # a table turned against the plant's direction is fitted again along it; the turned fit
    # is kept only when it is not more sure of itself
    tol = float(cfg["plant_axis_tol_deg"])
    axis_deg = plant_axis_deg(fits, tol)
    for i, (cand, fit) in enumerate(zip(fitted, fits)):
        if axis_deg is None or abs((_axis_deg(fit) - axis_deg + 90.0) % 180.0 - 90.0) <= tol:
            continue
        again = fit_table(orthos, _turned_to(cand, fit, axis_deg), module, layout, cfg, fixed_axis=True)
        if again is not None and again.rows * again.cols >= int(cfg["min_table_modules"]) \
                and again.confidence >= fit.confidence and again.misfit <= float(cfg["max_misfit"]):
            log.info("table at (%.1f, %.1f) turned %.1f deg off the plant's %.1f deg: fitted along the plant",
                     *cand.centre, _axis_deg(fit) - axis_deg, axis_deg)
            fits[i] = again
    kept = _combine(fits, cfg, parts)
    if not kept:
        raise LayoutError(f"{orthos.tiles[0].path}: no table of modules found in the ortho "
                          f"(module {module.width_m} x {module.length_m} m, tilt {layout.tilt_deg} deg)")
    rows: list[dict] = []
    tables: list[dict] = []
    for trow, tnum, f in _order(kept, layout.azimuth_deg):
        table_id = f"D{trow:02d}-{tnum:02d}"
        corners = f.corners()  # (rows, cols, 4, 2), row 0 = upper edge, col 0 = s_lo
        east = f.axis[0] > 1e-9 or (abs(f.axis[0]) <= 1e-9 and f.axis[1] > 0)
        visible = f.status != "nodata"
        for r in range(f.rows):
            for c in range(f.cols):
                if not visible[r, c]:
                    continue
                row_no = f.rows - r  # row 1 at the lower edge
                col_no = c + 1 if east else f.cols - c
                rows.append({"module_id": f"{table_id}-R{row_no}-C{col_no:02d}", "table_id": table_id,
                             "table_row": row_no, "table_col": col_no, "status": str(f.status[r, c]),
                             "confidence": round(f.confidence, 3), "orientation": f.orientation,
                             "geometry": polygons(corners[r, c])})
        outline = np.array([f.origin, f.origin + f.length_m * f.axis,
                            f.origin + f.length_m * f.axis + f.depth_m * f.across, f.origin + f.depth_m * f.across])
        tables.append({"table_id": table_id, "rows": f.rows, "cols": f.cols, "orientation": f.orientation,
                       "confidence": round(f.confidence, 3),
                       "status": "check" if f.confidence < float(cfg["check_confidence"]) else "ok",
                       "misfit": round(f.misfit, 3),
                       "angle_deg": round(math.degrees(math.atan2(f.axis[1], f.axis[0])), 4),
                       "module_along_m": round(f.module_s_m, 4), "module_across_m": round(f.module_w_m, 4),
                       "contrast_k": round(f.contrast_k, 2), "cut": ",".join(
                           n for n, c in zip(("start", "end", "upper", "lower"), f.cut) if c) or None,
                       "geometry": polygons(outline)})
    mod, tab = _frames(rows, tables, orthos.crs)
    footprint_m2 = module.width_m * module.length_m * math.cos(math.radians(float(layout.tilt_deg or 0.0)))
    cover = uncovered_glass(img, transform, [_outline(f) for f in kept], len(mod), module.width_m, footprint_m2,
                            cfg)
    del img
    drop = _dropped(dropped, kept, float(cfg["overlap_share"]), orthos.crs)
    log.info("detected %d tables, %d modules; %d lattices dropped", len(tab), len(mod), len(drop))
    return DetectedLayout(modules=mod, tables=tab, fits=kept, dropped=drop, coverage=cover)
