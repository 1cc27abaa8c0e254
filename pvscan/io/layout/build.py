"""The modules frame built from layout features: whole columns at once (see :func:`build_modules`)."""
from __future__ import annotations

import logging
import warnings
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import shapely

from pvscan.errors import LayoutError, LayoutWarning
from pvscan.io.layout.fields import FIELD_NAMES, _column, _feature_name, _ident, _ints, _strs, layout_fields
from pvscan.io.layout.frames import FRAME_COLUMNS, _frames_from_polygons
from pvscan.io.layout.split import _as_polygon, _group_tables, _rows_cols_for_loose, _split_tables

if TYPE_CHECKING:
    import geopandas as gpd

    from pvscan.io.manifest import LayoutSpec, ModuleSpec

__all__ = ["MODULE_COLUMNS", "ELECTRICAL_IDS", "build_modules"]

log = logging.getLogger("pvscan.io.layout")

#: Columns of the modules frame before the geometry, in this order. ``combiner_id`` and
#: ``inverter_id`` (the combiner box and the inverter a module's string feeds) are optional
#: layout properties: None when the layout does not give them.
MODULE_COLUMNS = ["module_id", "table_id", "string_id", "string_index", "combiner_id", "inverter_id",
                  "table_row", "table_col"]


#: Optional electrical properties carried through as text ids (a table's value for each of its modules).
ELECTRICAL_IDS = ("combiner_id", "inverter_id")


_POLYGON = 3  # shapely.GeometryType.POLYGON


def build_modules(gdf: gpd.GeoDataFrame, spec: LayoutSpec, module_spec: ModuleSpec | None = None,
                  path: Path | str = "layout") -> gpd.GeoDataFrame:
    """Turn layout features (already in a projected CRS [m]) into the modules GeoDataFrame.

    Works on whole columns (shapely 2 array functions, numpy): tables are split and frames
    built for all features at once; only features that need repair go one by one.

    Parameters
    ----------
    gdf : geopandas.GeoDataFrame
        Layout features in the target CRS.
    spec : LayoutSpec
        Array facts (rows, cols, orientation, gap, tilt, azimuth).
    module_spec : ModuleSpec, optional
        Used to warn when footprints disagree with the datasheet.
    path : path-like
        Named in messages.

    Returns
    -------
    geopandas.GeoDataFrame
        Columns module_id, table_id, string_id, string_index, combiner_id, inverter_id
        (text ids, None when the layout does not give them), table_row, table_col, geometry,
        fx0, fy0, fux, fuy, fvx, fvy, lower_edge, source_feature.

    Raises
    ------
    LayoutError
        Empty, non-polygon or unsplittable features and duplicate module ids, by feature id
        (the first bad feature in file order).
    """
    import geopandas as gpd

    path = Path(path)
    # GIS field names (Shapefile-truncated, other case, variants) -> the names used below
    fields, field_notes = layout_fields(gdf.columns)
    gdf = gdf.rename(columns={src: f"__{prop}" for prop, src in fields.items()})
    gdf = gdf.rename(columns={f"__{prop}": prop for prop in fields})
    n = len(gdf)
    geoms = np.asarray(gdf.geometry.to_numpy(), dtype=object)
    every = np.arange(n)

    def name_of(k: int) -> str:
        return _feature_name(gdf.iloc[k], k)

    def ints(prop: str, vals: np.ndarray, have: np.ndarray, where: np.ndarray = every) -> np.ndarray:
        return _ints(vals, have, fields.get(prop, prop), where, name_of, path)

    # --- properties, whole columns
    rows_v, rows_h = _column(gdf, "rows")
    cols_v, cols_h = _column(gdf, "cols")
    rows_v, cols_v = ints("rows", rows_v, rows_h), ints("cols", cols_v, cols_h)
    mid_v, mid_h = _column(gdf, "module_id")
    mid_h = mid_h & np.array([_ident(v) is not None for v in mid_v], bool)
    is_table = (rows_h & cols_h) | (~mid_h & (spec.rows is not None and spec.cols is not None))
    n_tables = np.cumsum(is_table)
    ti = np.flatnonzero(is_table)
    t_rows = np.array([int(v) if h else int(spec.rows or 0) for v, h in zip(rows_v[ti], rows_h[ti])], np.int64)
    t_cols = np.array([int(v) if h else int(spec.cols or 0) for v, h in zip(cols_v[ti], cols_h[ti])], np.int64)
    orient_v, orient_h = _column(gdf, "orientation")
    t_orient = np.array([str(v) if h else str(spec.orientation) for v, h in zip(orient_v[ti], orient_h[ti])],
                        dtype=object)
    # errors that do not depend on the geometry, by feature
    pre_err: dict[int, str] = {}
    for j in np.flatnonzero((t_rows < 1) | (t_cols < 1))[::-1]:
        pre_err[int(ti[j])] = "rows and cols must be at least 1"
    for j in np.flatnonzero((t_rows >= 1) & (t_cols >= 1) & ~np.isin(t_orient, ["portrait", "landscape"])):
        pre_err.setdefault(int(ti[j]), f"orientation {t_orient[j]!r} is not portrait or landscape")
    first_pre = min(pre_err) if pre_err else n

    # --- geometries: plain valid polygons as they are; the rest repaired or refused in file order
    polys = geoms.copy()
    missing = shapely.is_missing(geoms)
    problem = missing.copy()
    ok_g = ~missing
    problem[ok_g] = (shapely.is_empty(geoms[ok_g]) | shapely.has_z(geoms[ok_g])
                     | (shapely.get_type_id(geoms[ok_g]) != _POLYGON) | ~shapely.is_valid(geoms[ok_g])
                     | ~(shapely.area(geoms[ok_g]) > 1e-6 * shapely.length(geoms[ok_g]) ** 2))  # as _as_polygon
    geom_err: LayoutError | None = None
    first_geom = n
    for k in np.flatnonzero(problem).tolist():
        if k > first_pre:
            break
        try:
            polys[k] = _as_polygon(geoms[k], name_of(int(k)), path)
        except LayoutError as exc:  # raised below unless an earlier feature fails
            geom_err, first_geom = exc, int(k)
            break

    # --- tables: split all at once
    t_ok = np.array([int(k) not in pre_err for k in ti], bool)
    split, split_err = _split_tables(polys[ti[t_ok]], t_rows[t_ok], t_cols[t_ok], t_orient[t_ok] == "portrait",
                                     spec.gap_m, spec.tilt_deg, spec.azimuth_deg)
    errors = dict(pre_err)
    tio = ti[t_ok]
    for j, msg in split_err.items():
        errors.setdefault(int(tio[j]), msg)
    # --- loose module polygons: frames all at once
    li = np.flatnonzero(~is_table)
    l_frames, l_lower, l_ok = _frames_from_polygons(polys[li], spec.azimuth_deg)
    for j in np.flatnonzero(~l_ok):
        errors.setdefault(int(li[j]), "degenerate footprint")
    k = min(errors) if errors else int(n)
    if geom_err is not None and first_geom <= k:
        raise geom_err
    if errors:
        raise LayoutError(f"{path}: {name_of(k)}: {errors[k]}")

    # --- assemble in file order: a table's modules row by row, col by col
    count = np.ones(n, np.int64)
    count[ti] = t_rows * t_cols
    offset = np.cumsum(count) - count
    total = int(count.sum())
    t_pos = offset[ti][split["table"]] + (np.arange(len(split["table"]))
                                          - (np.cumsum(count[ti]) - count[ti])[split["table"]])
    l_pos = offset[li]
    source = np.repeat(np.arange(n), count)

    def column(table_vals: np.ndarray, loose_vals: np.ndarray) -> np.ndarray:
        out = np.full(total, None, dtype=object)
        out[t_pos] = table_vals
        out[l_pos] = loose_vals
        return out

    tid_v, tid_h = _column(gdf, "table_id")
    sid_v, sid_h = _column(gdf, "string_id")
    table_ids = np.array([(_ident(v) if h else None) or f"T{c:04d}"
                          for v, h, c in zip(tid_v[ti], tid_h[ti], n_tables[ti])], dtype=object)
    table_sid = _strs(sid_v[ti], sid_h[ti])
    tt = split["table"]
    t_table = table_ids[tt]
    t_mid = np.array([f"{a}-R{r}-C{c:02d}" for a, r, c in zip(t_table, split["row"], split["col"])], dtype=object)
    sidx_v, sidx_h = _column(gdf, "string_index")
    trow_v, trow_h = _column(gdf, "table_row")
    tcol_v, tcol_h = _column(gdf, "table_col")
    frames = np.empty((total, 6))
    frames[t_pos] = split["frames"]
    frames[l_pos] = l_frames
    geometry = column(split["geometry"], polys[li])
    df = pd.DataFrame({
        "module_id": column(t_mid, _strs(mid_v[li], mid_h[li])),
        "table_id": column(t_table, _strs(tid_v[li], tid_h[li])),
        "string_id": column(table_sid[tt], _strs(sid_v[li], sid_h[li])),
        "string_index": column(np.full(len(tt), None, dtype=object), ints("string_index", sidx_v[li], sidx_h[li], li)),
        **{prop: column(_strs(vals[ti], have[ti])[tt], _strs(vals[li], have[li]))
           for prop, (vals, have) in ((p, _column(gdf, p)) for p in ELECTRICAL_IDS)},
        "table_row": column(split["row"].astype(object), ints("table_row", trow_v[li], trow_h[li], li)),
        "table_col": column(split["col"].astype(object), ints("table_col", tcol_v[li], tcol_h[li], li)),
    })
    for j, name in enumerate(FRAME_COLUMNS):
        df[name] = frames[:, j]
    df["lower_edge"] = column(split["lower_edge"], l_lower)
    df["source_feature"] = source
    # ids for loose modules, in file order
    no_id = l_pos[~mid_h[li]]
    if no_id.size:
        df.loc[no_id, "module_id"] = [f"M{j + 1:05d}" for j in range(no_id.size)]
    dup = df["module_id"][df["module_id"].duplicated()]
    if len(dup):
        raise LayoutError(f"{path}: module_id {dup.iloc[0]} appears more than once")
    # tables / rows / cols of loose modules
    if li.size:
        sub = df.loc[l_pos]
        need_group = sub["table_id"].isna().any() or sub["table_row"].isna().any() or sub["table_col"].isna().any()
        if need_group:
            gap_tol = max(3 * spec.gap_m, 0.15)
            groups = _group_tables(polys[li], gap_tol)
            g_rows, g_cols = _rows_cols_for_loose(sub, groups, spec.azimuth_deg)
            tid = sub["table_id"].isna().to_numpy()
            df.loc[l_pos[tid], "table_id"] = [f"G{g + 1:04d}" for g in groups[tid]]
            fill = sub["table_row"].isna().to_numpy()
            df.loc[l_pos[fill], "table_row"] = g_rows[fill]
            fill = sub["table_col"].isna().to_numpy()
            df.loc[l_pos[fill], "table_col"] = g_cols[fill]
    df["string_index"] = pd.array(df["string_index"].to_numpy(dtype=object), dtype="Int64")
    df["table_row"] = df["table_row"].astype(int)
    df["table_col"] = df["table_col"].astype(int)
    df = df[MODULE_COLUMNS].assign(
        geometry=geometry, **{c: df[c] for c in FRAME_COLUMNS + ["lower_edge", "source_feature"]})
    out = gpd.GeoDataFrame(df, geometry="geometry", crs=gdf.crs)
    if module_spec is not None:
        _check_sizes(out, module_spec, path)
    report: dict[str, Any] = {"file": str(path), "features": int(n), "tables": int(len(ti)), "modules": int(len(out)),
              "fields": {prop: str(src) for prop, src in sorted(fields.items())}}
    report.update(_strings_report(out, fields, path))
    for note in field_notes:
        log.info("%s: %s", path, note)
    for w in report["warnings"]:
        warnings.warn(w, LayoutWarning, stacklevel=2)
    out.attrs["layout"] = report
    return out


def _strings_report(modules: pd.DataFrame, fields: dict[str, str], path: Path) -> dict[str, Any]:
    """How much of the electrical stringing the layout gives, and what is lost without it.

    Open strings and PID follow the modules of a string in order from its negative end,
    so they need both a string id and a position along the string for each module.

    Returns
    -------
    dict
        ``strings``: ``complete`` | ``partial`` | ``ids_only`` | ``positions_only`` | ``none``;
        ``n_strings``; ``warnings``: one line each, naming the field and what is lost.
    """
    sid = modules["string_id"].notna().to_numpy()
    pos = modules["string_index"].notna().to_numpy()
    n_strings = int(modules.loc[sid, "string_id"].nunique())
    fid = fields.get("string_id", "string_id")
    fpos = fields.get("string_index", "string_index")
    known = ", ".join(n for n in ("string_ind", *FIELD_NAMES["string_index"][1:4]))
    out: dict = {"n_strings": n_strings, "warnings": []}
    if not sid.any() and not pos.any():
        out["strings"] = "none"
        return out
    if sid.any() and not pos.any():
        out["strings"] = "ids_only"
        out["warnings"].append(
            f"{path}: field {fid} gives {n_strings} string id{'s' if n_strings != 1 else ''} but no field "
            "gives the modules' "
            f"positions along their strings (string_index, also read as {known} ...): open strings "
            "and PID, which need both, are not looked for")
        return out
    if pos.any() and not sid.any():
        out["strings"] = "positions_only"
        out["warnings"].append(
            f"{path}: field {fpos} gives positions along strings but no field gives string ids "
            "(string_id): open strings and PID are looked for only along table rows")
        return out
    lone = int(np.count_nonzero(sid != pos))
    dup = modules.loc[sid & pos].duplicated(subset=["string_id", "string_index"], keep=False)
    bad_strings = int(modules.loc[sid & pos].loc[dup.to_numpy(), "string_id"].nunique())
    out["strings"] = "complete" if lone == 0 and bad_strings == 0 else "partial"
    if lone:
        out["warnings"].append(
            f"{path}: {lone} of {len(modules)} modules have a string id ({fid}) or a string "
            f"position ({fpos}) but not both: they are left out of the open-string and PID checks")
    if bad_strings:
        out["warnings"].append(
            f"{path}: {bad_strings} string(s) give one position ({fpos}) to several modules: "
            "open strings and PID may be judged on a wrong module order there")
    return out


def _check_sizes(modules: pd.DataFrame, module_spec: ModuleSpec, path: Path) -> None:
    lu = np.hypot(modules["fux"], modules["fuy"])
    lv = np.hypot(modules["fvx"], modules["fvy"])
    # from above a tilted module looks shorter along the slope; accept 0.3..1.3 of the datasheet
    med_l = float(np.median(lu))
    med_w = float(np.median(lv))
    if not (0.3 * module_spec.length_m <= med_l <= 1.3 * module_spec.length_m) or not (
        0.3 * module_spec.width_m <= med_w <= 1.3 * module_spec.width_m
    ):
        warnings.warn(
            f"{path}: median footprint {med_l:.2f} x {med_w:.2f} m does not fit the datasheet "
            f"{module_spec.length_m} x {module_spec.width_m} m; check the layout's units and CRS",
            LayoutWarning, stacklevel=2)
