"""Result files: GeoJSON (RFC 7946), work-order CSV, GeoPackage and ``summary.json``.

Everything here writes *atomically*: a file is first written to a temporary sibling, flushed
to disk and then renamed over its final name (:func:`atomic_write`), and a whole result
folder is assembled in a temporary sibling folder that replaces the final folder only when
every file was written (:func:`staging_dir`). A failure therefore never leaves a
half-written file or folder behind.

Geometry
--------
GeoJSON files are in WGS84 longitude/latitude (RFC 7946 section 4), with counter-clockwise
exterior rings and clockwise holes (the right-hand rule of RFC 7946 section 3.1.6),
positions rounded to 7 decimals (about 1 cm) and no ``crs`` member. The GeoPackage and the
``x, y`` columns of the work-order CSV stay in the site's projected CRS (the ortho's CRS).

An anomaly's geometry is its affected region, built from the module-local frame of the
modules frame (columns ``fx0, fy0, fux, fuy, fvx, fvy``): a local box ``(u0, u1, v0, v1)``
maps to the quadrilateral with corners ``(fx0, fy0) + u * (fux, fuy) + v * (fvx, fvy)``.
Anomalies over several modules (``open_string``) are the union of their modules, with the
small gaps between neighbouring modules closed.

References
----------
.. [1] H. Butler et al., "The GeoJSON Format", IETF RFC 7946, 2016. doi:10.17487/RFC7946
.. [2] Open Geospatial Consortium, "OGC GeoPackage Encoding Standard", OGC 12-128r18, 2021.
"""
from __future__ import annotations

import contextlib
import csv
import io
import json
import logging
import math
import os
import shutil
import tempfile
import uuid
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import shapely
from pyproj import CRS, Transformer
from shapely.geometry import MultiPolygon, Point, Polygon, mapping
from shapely.geometry.polygon import orient

from pvscan.errors import OutputError, PvscanError
from pvscan.io.locking import HeldLock, try_lock
from pvscan.io.resources import describe_error, load_schema, schema_errors

__all__ = [
    "atomic_path",
    "atomic_write",
    "staging_dir",
    "clean_stale_staging",
    "write_failure",
    "to_jsonable",
    "geometry_to_geojson",
    "region_geometry",
    "anomaly_geometries",
    "module_results",
    "modules_feature_collection",
    "anomalies_feature_collection",
    "workorders_table",
    "write_modules_geojson",
    "write_anomalies_geojson",
    "write_workorders_csv",
    "read_workorders_csv",
    "write_geopackage",
    "build_summary",
    "write_summary",
    "safety_cautions",
    "validate_geojson_rfc7946",
    "validate_output",
    "MODULE_PROPERTIES",
    "ANOMALY_PROPERTIES",
    "WORKORDER_COLUMNS",
]

log = logging.getLogger(__name__)

#: Properties of every feature of ``modules.geojson``, in this order (CONTRACT.md first, extras after).
MODULE_PROPERTIES = (
    "module_id", "table_id", "t_mean_c", "t_median_c", "t_p95_c", "t_max_c", "t_min_c",
    "t_std_k", "valid_fraction", "reference_c", "delta_t_k", "delta_t_norm_k", "defect",
    "power_loss_w",
    # extras
    "string_id", "string_index", "table_row", "table_col", "severity", "confidence",
    "anomaly_ids", "energy_loss_kwh_per_year",
)

#: Properties of every feature of ``anomalies.geojson``, in this order.
ANOMALY_PROPERTIES = (
    "anomaly_id", "module_id", "module_ids", "defect", "severity", "delta_t_k",
    "delta_t_norm_k", "t_max_c", "power_loss_w", "energy_loss_kwh_per_year", "priority",
    "confidence",
    # extras
    "table_id", "other_defects", "action", "loss_method", "power_loss_w_flight", "iec_class",
    "region", "yearly_cost", "currency",
)

#: Columns of ``workorders.csv``, in this order.
WORKORDER_COLUMNS = (
    "priority", "anomaly_id", "module_id", "module_ids", "table_id", "table_row", "table_col",
    "string_id", "string_index", "defect", "severity", "action", "delta_t_k", "delta_t_norm_k",
    "power_loss_w", "energy_loss_kwh_per_year", "yearly_cost", "currency", "confidence", "lon", "lat", "x", "y",
    "crs",
)

_LIST_SEP = ";"
_DEFAULTS = {"lonlat_decimals": 7, "xy_decimals": 2, "merge_gap_m": 0.05}


def _section(settings: Mapping | None, name: str) -> Mapping:
    """The ``[name]`` section of a full pipeline, or ``settings`` itself if it is already a section."""
    if settings is None:
        return {}
    keys = list(iter(settings))
    if name in keys:
        return settings[name]
    return settings


def _settings(settings: Mapping | None) -> dict:
    out = dict(_DEFAULTS)
    sec = _section(settings, "outputs")
    for k in _DEFAULTS:
        if k in list(iter(sec)):
            out[k] = sec[k]
    return out

# --------------------------------------------------------------------------- atomic writing


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:  # not supported on every file system
        pass
    finally:
        os.close(fd)


def write_failure(exc: BaseException) -> str | None:
    """Why a write failed, when ``exc`` comes from the file system, GDAL or SQLite (disk full,
    permission, a failed commit); None for anything else (a bug, or a pvscan error)."""
    if isinstance(exc, PvscanError):
        return None
    if isinstance(exc, OSError):
        return exc.strerror or " ".join(str(exc).split()) or type(exc).__name__
    module = type(exc).__module__ or ""
    if module.split(".")[0] in ("pyogrio", "rasterio", "fiona", "sqlite3", "_sqlite3"):
        return " ".join(str(exc).split()) or type(exc).__name__
    return None


@contextlib.contextmanager
def atomic_path(path: str | os.PathLike, suffix: str = ".tmp") -> Iterator[Path]:
    """Yield a temporary sibling path for a writer (e.g. GDAL) that needs a file name; on
    success the file is fsync'ed and renamed over ``path``, on any failure it is removed.

    Raises
    ------
    OutputError
        If the file cannot be written: a file-system error (disk full, permission) or a
        GDAL/SQLite failure (e.g. a failed commit); the message names ``path``.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.stem}.{uuid.uuid4().hex[:8]}{suffix}")
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        for leftover in (tmp, *(tmp.with_name(tmp.name + s) for s in ("-journal", "-wal", "-shm"))):
            with contextlib.suppress(OSError):
                os.unlink(leftover)
        why = write_failure(exc)
        if why is not None:
            raise OutputError(f"{path}: cannot write: {why}") from None
        raise
    _fsync_dir(path.parent)


def atomic_write(path: str | os.PathLike, data: bytes | str) -> Path:
    """Write ``data`` to ``path`` so that readers see either the old file or the whole new one.

    The data go to a temporary file in the same folder, are flushed and fsync'ed, and the
    temporary file is renamed over ``path`` with :func:`os.replace` (atomic on POSIX and on
    Windows within one volume).

    Parameters
    ----------
    path : path-like
        Destination file. Its folder must exist.
    data : bytes or str
        Content; ``str`` is encoded as UTF-8.

    Returns
    -------
    pathlib.Path
        ``path``.

    Raises
    ------
    OutputError
        If the file cannot be written (the message names the file).
    """
    path = Path(path)
    payload = data.encode("utf-8") if isinstance(data, str) else bytes(data)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            fh.write(payload)
    return path


def _is_empty_dir(path: Path) -> bool:
    return path.is_dir() and not any(path.iterdir())


_STAGING = ".staging-"
_OLD = ".old-"


def clean_stale_staging(out_dir: str | os.PathLike) -> list[Path]:
    """Remove what killed runs left beside ``out_dir``: their staging folders
    (``.NAME.staging-XXXX``) and previous results moved aside (``.NAME.old-XXXX``).

    A run holds an exclusive lock (:mod:`pvscan.io.locking`) on its staging folder, and on
    the previous results while it swaps them out, for as long as it lives; the kernel drops
    the lock when the process dies, however it dies. A folder whose lock can be taken thus
    belongs to no living run and is removed; a locked one (a run still going) is left alone,
    and so is everything when locks are not available. Previous results moved aside by a
    run killed before it moved its own into place are moved back when ``out_dir`` is missing.

    Returns
    -------
    list of pathlib.Path
        The folders removed or restored.
    """
    out = Path(out_dir)
    parent = out.parent if str(out.parent) else Path(".")
    prefixes = (f".{out.name}{_STAGING}", f".{out.name}{_OLD}")
    try:
        candidates = sorted(p for p in parent.iterdir() if p.name.startswith(prefixes))
    except OSError:
        return []
    done = []
    for p in candidates:
        if p.is_symlink() or not p.is_dir():
            continue
        lock = try_lock(p)
        if not lock:  # a living run owns it (False), or no way to know (None)
            continue
        try:
            if p.name.startswith(prefixes[1]) and not out.exists():
                os.replace(p, out)
                log.warning("%s: restored the previous results that an interrupted run had moved to %s",
                            out, p.name)
            else:
                shutil.rmtree(p)
                log.info("%s: removed %s left by an interrupted run", out, p.name)
            done.append(p)
        except OSError as exc:
            log.warning("%s: cannot remove %s left by an interrupted run: %s", out, p, exc.strerror or exc)
        finally:
            lock.release()
    return done


def _new_staging(out: Path, parent: Path) -> tuple[Path, HeldLock | None]:
    """A fresh staging folder beside ``out``, locked by this process."""
    for _ in range(10):
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}{_STAGING}", dir=parent))
        lock = try_lock(tmp)
        if lock is False:  # a cleaner of another run took it in the instant before us
            continue
        os.chmod(tmp, 0o777 & ~_umask())
        return tmp, lock
    raise OSError(f"cannot create a staging folder in {parent}")


def _staged_message(exc: BaseException, tmp: Path, out: Path) -> BaseException | None:
    """The error to raise for ``exc`` raised while writing into the staging folder ``tmp``:
    file names inside it are given under ``out``; write failures become OutputError."""
    if isinstance(exc, PvscanError):
        if isinstance(exc, OutputError) and str(tmp) in str(exc):
            return OutputError(str(exc).replace(str(tmp), str(out)))
        return None
    why = write_failure(exc)
    if why is None:
        return None
    name = getattr(exc, "filename", None)
    if name and str(tmp) in str(name):
        return OutputError(f"{str(name).replace(str(tmp), str(out))}: cannot write: {why}")
    if name:
        return OutputError(f"{name}: {why}")
    return OutputError(f"{out}: cannot write: {why}")


@contextlib.contextmanager
def staging_dir(out_dir: str | os.PathLike, overwrite: bool = False) -> Iterator[Path]:
    """A temporary sibling folder that replaces ``out_dir`` only when the block succeeds.

    Parameters
    ----------
    out_dir : path-like
        The final result folder. It must not exist (an existing *empty* folder is accepted)
        unless ``overwrite`` is true. Missing parent folders are created.
    overwrite : bool
        Replace an existing ``out_dir`` (its old content is removed after the new folder
        is in place).

    Yields
    ------
    pathlib.Path
        The staging folder to write every output into.

    Raises
    ------
    OutputError
        If ``out_dir`` exists and ``overwrite`` is false, is not a folder, or cannot be
        created or replaced; and for every write failure in the block (disk full,
        permission, GDAL or SQLite errors), naming the file under ``out_dir``.

    Notes
    -----
    On any exception inside the ``with`` block the staging folder is removed and
    ``out_dir`` is left as it was, so no half-written result is ever visible there. The
    staging folder (``.NAME.staging-XXXX`` beside ``out_dir``) is locked by this process
    while it lives; :func:`clean_stale_staging`, called first, removes those of runs that
    were killed.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a folder")
    if out.exists() and not overwrite and not _is_empty_dir(out):
        raise OutputError(f"{out}: output folder exists and is not empty (use --overwrite to replace it)")
    parent = out.parent if str(out.parent) else Path(".")
    try:
        parent.mkdir(parents=True, exist_ok=True)
        clean_stale_staging(out)
        tmp, lock = _new_staging(out, parent)
    except OSError as exc:
        raise OutputError(f"{out}: cannot create the output folder: {exc.strerror or exc}") from None
    try:
        try:
            yield tmp
        except BaseException as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            mapped = _staged_message(exc, tmp, out)
            if mapped is not None:
                raise mapped from None
            raise
        # the block succeeded: move the staging folder into place
        try:
            if out.exists():
                if not overwrite and not _is_empty_dir(out):
                    raise OutputError(f"{out}: output folder appeared while writing (use --overwrite to replace it)")
                old = parent / f".{out.name}{_OLD}{uuid.uuid4().hex[:8]}"
                old_lock = try_lock(out)  # the lock moves with the folder: ours until removed
                try:
                    os.replace(out, old)
                    try:
                        os.replace(tmp, out)
                    except OSError:
                        os.replace(old, out)
                        raise
                    shutil.rmtree(old, ignore_errors=True)
                finally:
                    if old_lock:
                        old_lock.release()
            else:
                os.replace(tmp, out)
        except OSError as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            raise OutputError(f"{out}: cannot move results into place: {exc.strerror or exc}") from None
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        _fsync_dir(parent)
    finally:
        if lock:
            lock.release()


# --------------------------------------------------------------------------- JSON values


def to_jsonable(value: Any) -> Any:
    """Plain-JSON version of a value: NaN/NA -> None, numpy scalars -> Python, arrays -> lists."""
    if value is None:
        return None
    if isinstance(value, (str, bool)):
        return value
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, Mapping):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray, pd.Series)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, (set, frozenset)):
        return [to_jsonable(v) for v in sorted(value)]
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, (pd.Timestamp,)):
        return value.isoformat()
    if hasattr(value, "isoformat"):
        return value.isoformat()
    if hasattr(value, "__dataclass_fields__"):
        import dataclasses

        return to_jsonable(dataclasses.asdict(value))
    if hasattr(value, "to_dict"):
        return to_jsonable(value.to_dict())
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        pass
    return str(value)


def _round_floats(obj: Any, nd: int = 4) -> Any:
    """Round floats of property values (not coordinates) to ``nd`` decimals (0.1 mK, 0.1 mW)."""
    if isinstance(obj, float):
        return round(obj, nd)
    if isinstance(obj, list):
        return [_round_floats(v, nd) for v in obj]
    if isinstance(obj, dict):
        return {k: _round_floats(v, nd) for k, v in obj.items()}
    return obj


def _dumps(obj: Any, indent: int | None = None) -> str:
    if indent is None:
        return json.dumps(obj, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
    return json.dumps(obj, ensure_ascii=False, allow_nan=False, indent=indent) + "\n"


# --------------------------------------------------------------------------- geometry


def _round_coords(coords: Iterable, nd: int) -> list:
    return [[round(float(c), nd) for c in xy[:2]] for xy in coords]


def _polygon_to_rings(poly: Polygon, nd: int) -> list:
    poly = orient(poly, sign=1.0)  # exterior CCW, interiors CW (RFC 7946 3.1.6)
    rings = [_round_coords(poly.exterior.coords, nd)]
    rings += [_round_coords(r.coords, nd) for r in poly.interiors]
    return rings


def geometry_to_geojson(geom, decimals: int = 7) -> dict | None:
    """A GeoJSON geometry object of a shapely geometry already in lon/lat.

    Polygons follow the right-hand rule (RFC 7946 section 3.1.6) and positions are rounded
    to ``decimals``. Empty or missing geometry gives ``None`` (a feature with null geometry).
    """
    if geom is None or geom.is_empty:
        return None
    if isinstance(geom, Polygon):
        return {"type": "Polygon", "coordinates": _polygon_to_rings(geom, decimals)}
    if isinstance(geom, MultiPolygon):
        return {"type": "MultiPolygon", "coordinates": [_polygon_to_rings(p, decimals) for p in geom.geoms]}
    if isinstance(geom, Point):
        return {"type": "Point", "coordinates": [round(geom.x, decimals), round(geom.y, decimals)]}
    if geom.geom_type == "GeometryCollection":
        polys = [g for g in geom.geoms if isinstance(g, (Polygon, MultiPolygon))]
        if polys:
            return geometry_to_geojson(shapely.union_all(polys), decimals)
    gj = mapping(geom)
    return json.loads(json.dumps(gj))


def _to_lonlat(geoms: Sequence, crs) -> list:
    """Reproject shapely geometries from ``crs`` to WGS84 lon/lat (one pyproj call for all)."""
    if crs is None:
        raise OutputError("modules: the layout has no CRS; cannot write lon/lat")
    src = CRS.from_user_input(crs)
    arr = np.empty(len(geoms), dtype=object)
    arr[:] = list(geoms)
    if src.equals(CRS.from_epsg(4326)) or len(arr) == 0:
        return list(arr)
    tr = Transformer.from_crs(src, 4326, always_xy=True)
    return list(shapely.transform(arr, lambda xy: np.column_stack(tr.transform(xy[:, 0], xy[:, 1]))))


def _geoms_to_geojson(geoms: Sequence, decimals: int = 7) -> list:
    """:func:`geometry_to_geojson` of many lon/lat geometries; hole-free polygons in one vectorised pass."""
    arr = np.empty(len(geoms), dtype=object)
    arr[:] = list(geoms)
    out: list = [None] * len(arr)
    if len(arr) == 0:
        return out
    missing = shapely.is_missing(arr)
    present = ~missing
    present[present] = ~shapely.is_empty(arr[present])
    tid = np.full(len(arr), -1)
    tid[present] = shapely.get_type_id(arr[present])
    simple = present & (tid == 3)
    simple[simple] = shapely.get_num_interior_rings(arr[simple]) == 0
    pos = np.flatnonzero(simple)
    if pos.size:
        ext = shapely.get_exterior_ring(shapely.orient_polygons(arr[pos], exterior_cw=False))
        coords, index = shapely.get_coordinates(ext, return_index=True)
        lst = np.round(coords, decimals).tolist()
        counts = np.bincount(index, minlength=pos.size)
        start = 0
        for k, c in zip(pos.tolist(), counts.tolist()):
            out[k] = {"type": "Polygon", "coordinates": [lst[start:start + c]]}
            start += c
    for k in np.flatnonzero(present & ~simple).tolist():
        out[k] = geometry_to_geojson(arr[k], decimals)
    return out


def _column_values(frame: pd.DataFrame, col: str, nd: int = 4) -> list:
    """A column as JSON-ready Python values (floats rounded to ``nd`` decimals, NaN -> None)."""
    ser = frame[col]
    if pd.api.types.is_float_dtype(ser.dtype):
        vals = np.round(ser.to_numpy(dtype=float), nd)
        return [v if math.isfinite(v) else None for v in vals.tolist()]
    if pd.api.types.is_bool_dtype(ser.dtype) and ser.dtype != object:
        return [bool(v) for v in ser.tolist()]
    if pd.api.types.is_integer_dtype(ser.dtype):
        return [None if pd.isna(v) else int(v) for v in ser.astype(object).tolist()]
    return [_round_floats(to_jsonable(v), nd) for v in ser.tolist()]


def _frame_box(row, u0: float, u1: float, v0: float, v1: float) -> Polygon:
    ox, oy = float(row["fx0"]), float(row["fy0"])
    ux, uy = float(row["fux"]), float(row["fuy"])
    vx, vy = float(row["fvx"]), float(row["fvy"])
    pts = [(ox + u * ux + v * vx, oy + u * uy + v * vy) for u, v in ((u0, v0), (u1, v0), (u1, v1), (u0, v1))]
    return Polygon(pts)


def _boxes(region_uv) -> list[tuple[float, float, float, float]]:
    if region_uv is None:
        return []
    if isinstance(region_uv, float) and math.isnan(region_uv):
        return []
    arr = np.asarray(region_uv, dtype=float)
    if arr.size == 0:
        return []
    arr = arr.reshape(-1, 4)
    out = []
    for u0, u1, v0, v1 in arr:
        u0, u1 = sorted((min(max(u0, 0.0), 1.0), min(max(u1, 0.0), 1.0)))
        v0, v1 = sorted((min(max(v0, 0.0), 1.0), min(max(v1, 0.0), 1.0)))
        out.append((u0, u1, v0, v1))
    return out


def _indices(row) -> list[int]:
    idx = row.get("module_indices") if hasattr(row, "get") else None
    if idx is None or (isinstance(idx, float) and math.isnan(idx)):
        idx = []
    idx = [int(i) for i in np.asarray(idx).ravel()] if len(np.atleast_1d(idx)) else []
    first = row.get("module_index")
    if first is not None and not (isinstance(first, float) and math.isnan(first)):
        first = int(first)
        if first not in idx:
            idx = [first] + idx
    return idx


def region_geometry(modules, anomaly: Mapping, merge_gap_m: float = 0.05):
    """The affected region of one anomaly, in the modules' CRS.

    Parameters
    ----------
    modules : geopandas.GeoDataFrame
        The modules frame (footprints and module-local frame columns).
    anomaly : mapping
        One anomaly row: ``module_index``, optional ``module_indices`` and ``region_uv``
        (list of local boxes ``(u0, u1, v0, v1)``, each 0..1).
    merge_gap_m : float
        Gaps between the modules of a multi-module region up to this width are closed. [m]

    Returns
    -------
    shapely geometry
        A Polygon (or MultiPolygon when the parts are apart). Boxes covering a whole module
        use the footprint as drawn; smaller boxes use the module-local frame.
    """
    idx = _indices(anomaly)
    boxes = _boxes(anomaly.get("region_uv"))
    if not boxes:
        boxes = [(0.0, 1.0, 0.0, 1.0)]
    has_frame = all(c in modules.columns for c in ("fx0", "fy0", "fux", "fuy", "fvx", "fvy"))
    parts = []
    for i in idx:
        row = modules.iloc[i]
        for b in boxes:
            if b == (0.0, 1.0, 0.0, 1.0) or not has_frame:
                parts.append(row.geometry)
            else:
                parts.append(_frame_box(row, *b))
    parts = [p for p in parts if p is not None and not p.is_empty]
    if not parts:
        return None
    if len(parts) == 1:
        return orient(parts[0], 1.0) if isinstance(parts[0], Polygon) else parts[0]
    geom = shapely.union_all(parts)
    if len(idx) > 1 and merge_gap_m > 0 and not isinstance(geom, Polygon):
        closed = geom.buffer(merge_gap_m / 2, join_style="mitre").buffer(-merge_gap_m / 2, join_style="mitre")
        if not closed.is_empty:
            geom = closed
    return geom


def anomaly_geometries(anomalies: pd.DataFrame, modules, merge_gap_m: float = 0.05) -> list:
    """:func:`region_geometry` of every anomaly, in the modules' CRS (a list aligned with the rows)."""
    return [region_geometry(modules, row, merge_gap_m) for _, row in anomalies.iterrows()]


# --------------------------------------------------------------------------- per-module results


def _severity_rank(sev) -> int:
    return {"safety": 0, "repair": 1, "monitor": 2}.get(sev, 3)


def module_results(n_modules: int, anomalies: pd.DataFrame | None, pmax_w: float | None = None) -> pd.DataFrame:
    """Per-module columns derived from the anomalies.

    Returns a DataFrame with index ``0..n_modules-1`` and columns ``defect``, ``severity``,
    ``confidence``, ``anomaly_ids`` (list), ``power_loss_w`` [W] and
    ``energy_loss_kwh_per_year`` [kWh/yr]. A module's defect is that of its most urgent
    anomaly (lowest priority number; else safety > repair > monitor); its losses are its own
    *shares* (:func:`pvscan.diagnose.loss.module_losses`), so an open string's loss is split over its
    modules and plant totals never double count. Healthy modules get ``defect = None`` and
    zero loss. Given ``pmax_w`` [W], a module's summed shares are capped at its nameplate.
    """
    from pvscan.diagnose.loss import module_losses

    out = pd.DataFrame({
        "defect": pd.Series([None] * n_modules, dtype=object),
        "severity": pd.Series([None] * n_modules, dtype=object),
        "confidence": np.full(n_modules, np.nan),
        "anomaly_ids": pd.Series([[] for _ in range(n_modules)], dtype=object),
        "power_loss_w": np.zeros(n_modules),
        "energy_loss_kwh_per_year": np.zeros(n_modules),
    })
    if anomalies is None or len(anomalies) == 0:
        return out
    best: dict[int, tuple] = {}
    for pos, (_, row) in enumerate(anomalies.iterrows()):
        prio = row.get("priority")
        prio = float(prio) if prio is not None and not pd.isna(prio) else math.inf
        key = (prio, _severity_rank(row.get("severity")), pos)
        aid = row.get("anomaly_id")
        for i in _indices(row):
            if not 0 <= i < n_modules:
                continue
            if aid is not None and not pd.isna(aid):
                out.at[i, "anomaly_ids"] = out.at[i, "anomaly_ids"] + [str(aid)]
            if i not in best or key < best[i][0]:
                best[i] = (key, row)
    for i, (_, row) in best.items():
        out.at[i, "defect"] = row.get("defect")
        out.at[i, "severity"] = row.get("severity")
        conf = row.get("confidence")
        out.at[i, "confidence"] = float(conf) if conf is not None and not pd.isna(conf) else np.nan
    if "power_loss_w" in anomalies.columns:
        shares = module_losses(anomalies, n_modules, pmax_w)
        out["power_loss_w"] = shares["power_loss_w"].to_numpy()
        out["energy_loss_kwh_per_year"] = shares["energy_loss_kwh_per_year"].to_numpy()
    return out


def _value(frame: pd.DataFrame | None, col: str, pos: int):
    if frame is None or col not in frame.columns:
        return None
    return frame[col].iloc[pos]


def modules_feature_collection(modules, module_table: pd.DataFrame | None = None,
                               anomalies: pd.DataFrame | None = None, decimals: int = 7,
                               pmax_w: float | None = None) -> dict:
    """The RFC 7946 FeatureCollection of ``modules.geojson`` (see :func:`write_modules_geojson`)."""
    n = len(modules)
    if module_table is not None and len(module_table) != n:
        raise OutputError(f"modules.geojson: the module table has {len(module_table)} rows for {n} modules")
    derived = module_results(n, anomalies, pmax_w) if anomalies is not None else None
    geoms = _geoms_to_geojson(_to_lonlat(list(modules.geometry), modules.crs), decimals)
    columns: dict[str, list] = {}
    for key in MODULE_PROPERTIES:
        for frame in (module_table, modules, derived):
            if frame is not None and key in frame.columns:
                columns[key] = _column_values(frame, key)
                break
        else:
            columns[key] = [[] for _ in range(n)] if key == "anomaly_ids" else [None] * n
    for key in ("module_id", "table_id", "string_id"):
        columns[key] = [None if v is None else str(v) for v in columns[key]]
    columns["anomaly_ids"] = [[] if v is None else v for v in columns["anomaly_ids"]]
    columns["power_loss_w"] = [0.0 if p is None and d is None else p
                               for p, d in zip(columns["power_loss_w"], columns["defect"])]
    features = []
    for pos in range(n):
        props = {key: columns[key][pos] for key in MODULE_PROPERTIES}
        features.append({"type": "Feature", "id": props["module_id"], "geometry": geoms[pos], "properties": props})
    return {"type": "FeatureCollection", "features": features}


def write_modules_geojson(path: str | os.PathLike, modules_gdf, module_table: pd.DataFrame | None = None,
                          anomalies: pd.DataFrame | None = None, settings: Mapping | None = None,
                          module_spec: Any = None) -> Path:
    """Write ``modules.geojson``: one RFC 7946 feature per module, footprint as drawn.

    Parameters
    ----------
    path : path-like
        Output file.
    modules_gdf : geopandas.GeoDataFrame
        The modules frame (``module_id``, ``table_id``, ``string_id``, ``string_index``,
        ``table_row``, ``table_col``, geometry) in a projected CRS.
    module_table : pandas.DataFrame, optional
        Aligned with the modules (same length, same order): ``t_mean_c, t_median_c,
        t_p95_c, t_max_c, t_min_c`` [degC], ``t_std_k`` [K], ``valid_fraction`` [-],
        ``reference_c`` [degC], ``delta_t_k``, ``delta_t_norm_k`` [K] and optionally
        ``defect``, ``severity``, ``confidence``, ``power_loss_w`` [W].
    anomalies : pandas.DataFrame, optional
        Ranked anomalies; they fill ``defect``, ``severity``, ``confidence``,
        ``anomaly_ids`` and the per-module loss shares where the module table lacks them.
    settings : mapping, optional
        The pipeline (or its ``[outputs]`` section).
    module_spec : ModuleSpec, optional
        Its ``pmax_w`` [W] caps a module's summed loss shares.

    Notes
    -----
    Values that are NaN are written as ``null``; a healthy module has ``defect: null``
    and ``power_loss_w: 0``.
    """
    cfg = _settings(settings)
    pmax = getattr(module_spec, "pmax_w", None) if module_spec is not None else None
    fc = modules_feature_collection(modules_gdf, module_table, anomalies, cfg["lonlat_decimals"], pmax)
    return atomic_write(path, _dumps(fc))


def _table_id_of(modules, i):
    return modules["table_id"].iloc[i] if "table_id" in modules.columns and 0 <= i < len(modules) else None


def anomalies_feature_collection(anomalies: pd.DataFrame, modules, decimals: int = 7,
                                 merge_gap_m: float = 0.05) -> dict:
    """The RFC 7946 FeatureCollection of ``anomalies.geojson`` (see :func:`write_anomalies_geojson`)."""
    from pvscan.diagnose.rank import assign_anomaly_ids

    anomalies = assign_anomaly_ids(anomalies)
    if "priority" in anomalies.columns and len(anomalies):
        anomalies = anomalies.sort_values("priority", kind="stable", na_position="last")
    geoms = _geoms_to_geojson(_to_lonlat(anomaly_geometries(anomalies, modules, merge_gap_m), modules.crs),
                              decimals)
    features = []
    for pos, (_, row) in enumerate(anomalies.iterrows()):
        idx = _indices(row)
        props = {}
        for key in ANOMALY_PROPERTIES:
            val = row.get(key) if key in anomalies.columns else None
            if key == "module_ids" and (val is None or not len(np.atleast_1d(val))):
                val = [modules["module_id"].iloc[i] for i in idx] if "module_id" in modules.columns else []
            if key == "module_id" and (val is None or (isinstance(val, float) and math.isnan(val))):
                val = modules["module_id"].iloc[idx[0]] if idx else None
            if key == "table_id" and val is None and idx:
                val = _table_id_of(modules, idx[0])
            if key == "other_defects" and val is None:
                val = []
            props[key] = _round_floats(to_jsonable(val))
        props["module_ids"] = [str(m) for m in props["module_ids"]]
        if props["module_id"] is not None:
            props["module_id"] = str(props["module_id"])
        if props["table_id"] is not None:
            props["table_id"] = str(props["table_id"])
        features.append({"type": "Feature", "id": props["anomaly_id"], "geometry": geoms[pos], "properties": props})
    return {"type": "FeatureCollection", "features": features}


def write_anomalies_geojson(path: str | os.PathLike, anomalies: pd.DataFrame, modules_gdf,
                            settings: Mapping | None = None) -> Path:
    """Write ``anomalies.geojson``: one RFC 7946 feature per anomaly, geometry = its affected region.

    Parameters
    ----------
    path : path-like
        Output file.
    anomalies : pandas.DataFrame
        Classified, loss-estimated and ranked anomalies (columns of DEVELOPERS.md: ``module_index``,
        ``module_indices``, ``region_uv``, ``defect``, ``severity``, ``delta_t_k`` [K],
        ``power_loss_w`` [W], ``energy_loss_kwh_per_year`` [kWh/yr], ``priority``, ...).
        Missing ``anomaly_id`` values are assigned by :func:`pvscan.diagnose.rank.assign_anomaly_ids`.
    modules_gdf : geopandas.GeoDataFrame
        The modules frame (positions as drawn, module-local frame columns).
    settings : mapping, optional
        The pipeline (or its ``[outputs]`` section): ``lonlat_decimals``, ``merge_gap_m``.

    Notes
    -----
    Features are written in priority order. ``power_loss_w`` is at STC; an ``open_string``
    feature carries the run's total loss (the modules file carries each module's share).
    """
    cfg = _settings(settings)
    fc = anomalies_feature_collection(anomalies, modules_gdf, cfg["lonlat_decimals"], cfg["merge_gap_m"])
    return atomic_write(path, _dumps(fc))


# --------------------------------------------------------------------------- work orders


def _crs_name(crs) -> str:
    crs = CRS.from_user_input(crs)
    auth = crs.to_authority()
    return f"{auth[0]}:{auth[1]}" if auth else crs.to_string()


def workorders_table(anomalies: pd.DataFrame, modules_gdf, site_crs=None, settings: Mapping | None = None):
    """The work orders as a GeoDataFrame of points (region centroids) in ``site_crs``.

    Columns are :data:`WORKORDER_COLUMNS`; lists (``module_ids``) are joined with ``;``.
    Rows are in priority order. ``lon, lat`` [deg] are WGS84 (7 decimals), ``x, y`` [m] are
    in ``site_crs`` (2 decimals; default: the modules' CRS), named in the ``crs`` column.
    """
    import geopandas as gpd

    from pvscan.diagnose.rank import assign_anomaly_ids

    cfg = _settings(settings)
    site_crs = CRS.from_user_input(site_crs if site_crs is not None else modules_gdf.crs)
    anomalies = assign_anomaly_ids(anomalies)
    if "priority" in anomalies.columns and len(anomalies):
        anomalies = anomalies.sort_values("priority", kind="stable", na_position="last")
    geoms = anomaly_geometries(anomalies, modules_gdf, cfg["merge_gap_m"])
    cents = [g.centroid if g is not None else None for g in geoms]
    src = CRS.from_user_input(modules_gdf.crs)
    to_site = None if src.equals(site_crs) else Transformer.from_crs(src, site_crs, always_xy=True)
    to_ll = Transformer.from_crs(src, 4326, always_xy=True)
    rows, points = [], []
    crs_name = _crs_name(site_crs)
    for (_, a), c in zip(anomalies.iterrows(), cents):
        idx = _indices(a)
        i0 = idx[0] if idx else None
        rec = {}
        for col in WORKORDER_COLUMNS:
            val = a.get(col) if col in anomalies.columns else None
            if val is None and i0 is not None and col in modules_gdf.columns and col in (
                    "module_id", "table_id", "table_row", "table_col", "string_id", "string_index"):
                val = modules_gdf[col].iloc[i0]
            rec[col] = _round_floats(to_jsonable(val))
        mids = rec["module_ids"]
        if not mids:
            mids = [modules_gdf["module_id"].iloc[i] for i in idx] if "module_id" in modules_gdf.columns else []
        rec["module_ids"] = _LIST_SEP.join(str(m) for m in mids)
        if c is None:
            rec.update(lon=None, lat=None, x=None, y=None)
            points.append(None)
        else:
            lon, lat = to_ll.transform(c.x, c.y)
            x, y = to_site.transform(c.x, c.y) if to_site else (c.x, c.y)
            rec.update(lon=round(float(lon), cfg["lonlat_decimals"]), lat=round(float(lat), cfg["lonlat_decimals"]),
                       x=round(float(x), cfg["xy_decimals"]), y=round(float(y), cfg["xy_decimals"]))
            points.append(Point(float(x), float(y)))
        rec["crs"] = crs_name
        for k in ("module_id", "table_id", "string_id"):
            if rec[k] is not None:
                rec[k] = str(rec[k])
        rows.append(rec)
    frame = pd.DataFrame(rows, columns=list(WORKORDER_COLUMNS))
    return gpd.GeoDataFrame(frame, geometry=gpd.GeoSeries(points, crs=site_crs), crs=site_crs)


def _csv_cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        if not math.isfinite(v):
            return ""
        return repr(v) if v != int(v) or abs(v) >= 1e15 else f"{v:.1f}"
    return str(v)


def write_workorders_csv(path: str | os.PathLike, anomalies: pd.DataFrame, modules_gdf, site_crs=None,
                         settings: Mapping | None = None) -> Path:
    """Write ``workorders.csv``: one row per anomaly, in priority order.

    A plain comma-separated file with one header line (no comment lines), UTF-8, so any
    spreadsheet or GIS reads it. Columns: :data:`WORKORDER_COLUMNS`. Empty cells are
    missing values. ``lon, lat`` are WGS84 [deg] of the affected region's centroid, ``x, y``
    the same point in the site's projected CRS [m], named in the ``crs`` column.
    """
    table = workorders_table(anomalies, modules_gdf, site_crs, settings)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(WORKORDER_COLUMNS)
    for rec in table[list(WORKORDER_COLUMNS)].itertuples(index=False):
        w.writerow([_csv_cell(to_jsonable(v)) for v in rec])
    return atomic_write(path, buf.getvalue())


def read_workorders_csv(path: str | os.PathLike) -> list[dict]:
    """Read ``workorders.csv`` back into typed rows (types from ``schemas/workorders.schema.json``).

    Empty cells become ``None``; numbers are parsed per the schema's declared type.
    """
    props = load_schema("workorders.schema.json")["properties"]
    out = []
    with open(path, newline="", encoding="utf-8") as fh:
        for raw in csv.DictReader(fh):
            rec = {}
            for k, v in raw.items():
                types = props.get(k, {}).get("type", "string")
                types = types if isinstance(types, list) else [types]
                if v == "":
                    rec[k] = None if "null" in types else v
                elif "integer" in types:
                    rec[k] = int(float(v))
                elif "number" in types:
                    rec[k] = float(v)
                else:
                    rec[k] = v
            out.append(rec)
    return out


# --------------------------------------------------------------------------- GeoPackage


def _flatten_lists(frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame.copy()
    for col in frame.columns:
        if col == frame.geometry.name:
            continue
        if frame[col].dtype == object:
            vals = frame[col].tolist()
            if any(isinstance(v, (list, tuple, np.ndarray)) for v in vals):
                frame[col] = [_LIST_SEP.join(str(x) for x in v) if isinstance(v, (list, tuple, np.ndarray))
                              else (None if v is None else str(v)) for v in vals]
    return frame


def write_geopackage(path: str | os.PathLike, modules, anomalies, workorders, settings: Mapping | None = None) -> Path:
    """Write a GeoPackage with layers ``modules``, ``anomalies`` and ``workorders``.

    Parameters
    ----------
    path : path-like
        Output ``.gpkg`` file (written to a temporary sibling, then renamed into place).
    modules : geopandas.GeoDataFrame
        Module footprints with their result columns (e.g. the modules frame joined with
        :func:`module_results` and the statistics), in the site's projected CRS.
    anomalies : geopandas.GeoDataFrame or pandas.DataFrame
        A GeoDataFrame of affected regions, or the anomalies DataFrame (its regions are
        built with :func:`region_geometry` from ``modules``).
    workorders : geopandas.GeoDataFrame
        Points, as returned by :func:`workorders_table`.

    Notes
    -----
    List columns are stored as ``;``-joined text (GeoPackage has no list type). The
    frame columns ``fx0 ... fvy`` and ``region_uv`` are internal and left out.
    """
    import geopandas as gpd

    cfg = _settings(settings)
    path = Path(path)
    crs = modules.crs
    mod = gpd.GeoDataFrame(modules.drop(columns=[c for c in ("fx0", "fy0", "fux", "fuy", "fvx", "fvy")
                                                  if c in modules.columns]), crs=crs)
    if not isinstance(anomalies, gpd.GeoDataFrame):
        from pvscan.diagnose.rank import assign_anomaly_ids

        an = assign_anomaly_ids(anomalies)
        geoms = anomaly_geometries(an, modules, cfg["merge_gap_m"])
        keep = [c for c in ANOMALY_PROPERTIES if c in an.columns]
        an = gpd.GeoDataFrame(an[keep].reset_index(drop=True), geometry=gpd.GeoSeries(geoms, crs=crs), crs=crs)
    else:
        an = anomalies.drop(columns=[c for c in ("region_uv",) if c in anomalies.columns])
    an = gpd.GeoDataFrame(an, geometry=an.geometry.name, crs=an.crs)
    if len(an):
        an = an.set_geometry([g if g is None or isinstance(g, MultiPolygon) else MultiPolygon([g])
                              if isinstance(g, Polygon) else g for g in an.geometry], crs=an.crs)
    with atomic_path(path, suffix=".tmp.gpkg") as tmp:
        for layer, frame, gtype in (("modules", mod, None), ("anomalies", an, "MultiPolygon"),
                                    ("workorders", workorders, "Point")):
            frame = _flatten_lists(gpd.GeoDataFrame(frame).reset_index(drop=True))
            kwargs = {}
            if len(frame) == 0 and gtype:
                kwargs["geometry_type"] = gtype
            frame.to_file(tmp, layer=layer, driver="GPKG", engine="pyogrio", **kwargs)
    return path


# --------------------------------------------------------------------------- summary


def safety_cautions() -> list[str]:
    """Cautions printed in ``summary.json`` and the report (plain words, deferring to local rules)."""
    return [
        "PV modules and strings carry live DC voltage whenever light falls on them, even when the "
        "inverter or the string is disconnected; daylight alone energises them.",
        "Faulty connectors, junction boxes and bypass diodes can arc and start fires; DC arcs do not "
        "self-extinguish. Keep clear of damaged or smoking components and follow the site's emergency "
        "procedure.",
        "Hot spots and junction boxes can be hot enough to burn skin; let them cool or use suitable "
        "protective equipment before touching.",
        "Only qualified, authorised persons may open, test or repair PV electrical equipment, under the "
        "local electrical codes and the site's safety rules.",
        "Drone flights must follow the local aviation rules and the site's permissions; keep clear of "
        "people, overhead lines and operating equipment.",
        "These results are estimates from thermal imaging; confirm every finding on site before acting "
        "on it.",
    ]


def _counts(values: Iterable) -> dict[str, int]:
    out: dict[str, int] = {}
    for v in values:
        if v is None or (isinstance(v, float) and math.isnan(v)):
            continue
        out[str(v)] = out.get(str(v), 0) + 1
    return dict(sorted(out.items()))


def _fsum(series) -> float:
    vals = pd.to_numeric(pd.Series(series), errors="coerce").to_numpy(dtype=float)
    vals = vals[np.isfinite(vals)]
    return float(vals.sum()) if vals.size else 0.0


def build_summary(*, modules, anomalies: pd.DataFrame | None, module_spec=None,
                  inputs: Mapping | None = None, conditions: Mapping | None = None,
                  validity: Any = None, registration: Any = None,
                  layout_shift_m: Sequence[float] = (0.0, 0.0), pipeline_path=None,
                  site: Any = None, flight: Any = None, extra: Mapping | None = None) -> dict:
    """Assemble the ``summary.json`` document (validated later by :func:`write_summary`).

    Parameters
    ----------
    modules : geopandas.GeoDataFrame
        The modules frame (for counts and the plant nameplate).
    anomalies : pandas.DataFrame or None
        Loss-estimated, ranked anomalies.
    module_spec : ModuleSpec, optional
        For the plant nameplate ``n_modules * pmax_w`` [W] and the plant share of the loss.
    inputs : mapping, optional
        ``files`` (list of paths), ``crs`` (site CRS), ``gsd_m`` [m/px], ...
    conditions : mapping, optional
        Flight conditions (mean ``poa_global`` [W/m2], ``temp_air`` [degC], ``wind_speed``
        [m/s], ...).
    validity : mapping or dataclass, optional
        The acquisition-validity record (each limit, its value, pass/fail, source).
    registration : mapping or dataclass, optional
        Registration details (method, score, ...).
    layout_shift_m : (float, float)
        Shift applied to the layout to fit the ortho, east and north [m].
    pipeline_path : path-like, optional
        The pipeline file used.
    site, flight : optional
        ``Site`` and ``FlightInfo`` records (name, id, start, end).
    extra : mapping, optional
        Further top-level keys.
    """
    from pvscan import __version__
    from pvscan.diagnose.loss import module_losses

    n = len(modules)
    an = anomalies if anomalies is not None else pd.DataFrame()
    pmax = getattr(module_spec, "pmax_w", None) if module_spec is not None else None
    shares = module_losses(an, n, pmax) if len(an) and "power_loss_w" in an.columns else None
    total_stc = float(shares["power_loss_w"].sum()) if shares is not None else 0.0
    total_flight = float(np.nansum(shares["power_loss_w_flight"])) if shares is not None else 0.0
    total_energy = float(np.nansum(shares["energy_loss_kwh_per_year"])) if shares is not None else 0.0
    nameplate = float(n * pmax) if pmax else None
    affected = set()
    for _, row in an.iterrows():
        affected.update(_indices(row))
    loss = {
        "power_loss_w": round(total_stc, 3),
        "power_loss_w_flight": round(total_flight, 3),
        "energy_loss_kwh_per_year": round(total_energy, 3),
        "plant_pmax_w": nameplate,
        "plant_share": (total_stc / nameplate) if nameplate else None,
        "specific_yield_kwh_per_kwp": to_jsonable(an.attrs.get("specific_yield_kwh_per_kwp")),
        "specific_yield_source": an.attrs.get("specific_yield_source"),
        "basis": "sum of per-module shares (an anomaly over several modules counted once)",
    }
    if "yearly_cost" in an.columns:
        loss["yearly_cost"] = round(_fsum(an["yearly_cost"]), 2)
        loss["currency"] = getattr(site, "currency", None)
    summary = {
        "pvscan_version": __version__,
        "pipeline": None if pipeline_path is None else os.fspath(pipeline_path),
        "site": to_jsonable({"name": getattr(site, "name", None), "id": getattr(site, "id", None)}) if site else {},
        "flight": to_jsonable({k: getattr(flight, k, None) for k in ("id", "start", "end", "altitude_m")})
        if flight else {},
        "inputs": to_jsonable(dict(inputs or {})),
        "conditions": to_jsonable(dict(conditions or {})),
        "validity": to_jsonable(validity) if validity is not None else None,
        "counts": {
            "modules": n,
            "modules_affected": len(affected),
            "anomalies": int(len(an)),
            "by_defect": _counts(an["defect"]) if "defect" in an.columns else {},
            "by_severity": _counts(an["severity"]) if "severity" in an.columns else {},
        },
        "loss": loss,
        "power_loss_w": loss["power_loss_w"],
        "layout_shift_m": [float(layout_shift_m[0]), float(layout_shift_m[1])],
        "registration": to_jsonable(registration) if registration is not None else None,
        "safety": safety_cautions(),
    }
    if summary["registration"] is not None and not isinstance(summary["registration"], Mapping):
        summary["registration"] = {"value": summary["registration"]}
    if summary["validity"] is not None and not isinstance(summary["validity"], Mapping):
        summary["validity"] = {"checks": summary["validity"]}
    if extra:
        summary.update(to_jsonable(dict(extra)))
    return summary


def write_summary(path: str | os.PathLike, summary: Mapping) -> Path:
    """Validate ``summary`` against ``schemas/summary.schema.json`` and write it (indented UTF-8 JSON).

    Raises
    ------
    OutputError
        If the document does not match the schema (the message names the key).
    """
    doc = to_jsonable(dict(summary))
    errs = schema_errors(doc, load_schema("summary.schema.json"))
    if errs:
        raise OutputError(f"{Path(path).name}: {describe_error(errs[0])}")
    return atomic_write(path, _dumps(doc, indent=2))


# --------------------------------------------------------------------------- validation


def _signed_area(ring: Sequence[Sequence[float]]) -> float:
    a = 0.0
    for (x0, y0), (x1, y1) in zip(ring[:-1], ring[1:]):
        a += x0 * y1 - x1 * y0
    return a / 2.0


def _check_position(p, where: str, problems: list[str]) -> None:
    if not isinstance(p, list) or len(p) < 2 or not all(isinstance(c, (int, float)) and not isinstance(c, bool)
                                                         for c in p):
        problems.append(f"{where}: position is not a list of 2 or 3 numbers")
        return
    lon, lat = p[0], p[1]
    if not (-180.0 <= lon <= 180.0):
        problems.append(f"{where}: longitude {lon} outside -180..180")
    if not (-90.0 <= lat <= 90.0):
        problems.append(f"{where}: latitude {lat} outside -90..90")


def _check_polygon(rings, where: str, problems: list[str]) -> None:
    if not isinstance(rings, list) or not rings:
        problems.append(f"{where}: polygon without rings")
        return
    for k, ring in enumerate(rings):
        w = f"{where} ring {k}"
        if not isinstance(ring, list) or len(ring) < 4:
            problems.append(f"{w}: a linear ring needs at least 4 positions")
            continue
        for p in ring:
            _check_position(p, w, problems)
        if ring[0] != ring[-1]:
            problems.append(f"{w}: ring is not closed")
            continue
        area = _signed_area(ring)
        if k == 0 and area <= 0:
            problems.append(f"{w}: exterior ring is not counter-clockwise (RFC 7946 3.1.6)")
        if k > 0 and area >= 0:
            problems.append(f"{w}: hole is not clockwise (RFC 7946 3.1.6)")


def _check_geometry(g, where: str, problems: list[str]) -> None:
    if g is None:
        return
    if not isinstance(g, Mapping) or "type" not in g:
        problems.append(f"{where}: geometry is not an object with a type")
        return
    if "crs" in g:
        problems.append(f"{where}: geometry has a 'crs' member (removed in RFC 7946)")
    t, c = g["type"], g.get("coordinates")
    if t == "Point":
        _check_position(c, where, problems)
    elif t in ("MultiPoint", "LineString"):
        for p in c or []:
            _check_position(p, where, problems)
    elif t == "MultiLineString":
        for line in c or []:
            for p in line:
                _check_position(p, where, problems)
    elif t == "Polygon":
        _check_polygon(c, where, problems)
    elif t == "MultiPolygon":
        for j, poly in enumerate(c or []):
            _check_polygon(poly, f"{where} part {j}", problems)
    elif t == "GeometryCollection":
        for j, sub in enumerate(g.get("geometries", [])):
            _check_geometry(sub, f"{where} member {j}", problems)
    else:
        problems.append(f"{where}: unknown geometry type {t!r}")


def validate_geojson_rfc7946(obj: Mapping) -> list[str]:
    """Problems that make ``obj`` not a valid RFC 7946 FeatureCollection (empty list when valid).

    Checks: a FeatureCollection of Features each with ``geometry`` and ``properties``
    members; no ``crs`` member; positions of 2 or 3 numbers with longitude in -180..180 and
    latitude in -90..90 (WGS84, RFC 7946 section 4); linear rings closed with at least 4
    positions; exterior rings counter-clockwise and holes clockwise (section 3.1.6).
    """
    problems: list[str] = []
    if not isinstance(obj, Mapping) or obj.get("type") != "FeatureCollection":
        return ["top level: not a FeatureCollection"]
    if "crs" in obj:
        problems.append("top level: has a 'crs' member (removed in RFC 7946)")
    feats = obj.get("features")
    if not isinstance(feats, list):
        return problems + ["top level: 'features' is not a list"]
    for i, f in enumerate(feats):
        where = f"feature {i}"
        if not isinstance(f, Mapping) or f.get("type") != "Feature":
            problems.append(f"{where}: not a Feature")
            continue
        if "geometry" not in f or "properties" not in f:
            problems.append(f"{where}: a Feature needs 'geometry' and 'properties' members")
        if "crs" in f:
            problems.append(f"{where}: has a 'crs' member (removed in RFC 7946)")
        _check_geometry(f.get("geometry"), where, problems)
    return problems


def validate_output(out_dir: str | os.PathLike) -> dict[str, list[str]]:
    """Check every output file in ``out_dir`` against its JSON Schema (and RFC 7946 for GeoJSON).

    Returns a mapping ``file name -> problems`` (empty lists when valid); files that do not
    exist are reported as missing.
    """
    out_dir = Path(out_dir)
    report: dict[str, list[str]] = {}
    for name, schema in (("modules.geojson", "modules.schema.json"), ("anomalies.geojson", "anomalies.schema.json"),
                         ("summary.json", "summary.schema.json")):
        p = out_dir / name
        if not p.exists():
            report[name] = ["missing"]
            continue
        doc = json.loads(p.read_text(encoding="utf-8"))
        probs = [describe_error(e) for e in schema_errors(doc, load_schema(schema))]
        if name.endswith(".geojson"):
            probs += validate_geojson_rfc7946(doc)
        report[name] = probs
    p = out_dir / "workorders.csv"
    if p.exists():
        schema = load_schema("workorders.schema.json")
        probs = []
        for k, row in enumerate(read_workorders_csv(p)):
            probs += [f"row {k + 1}: {describe_error(e)}" for e in schema_errors(row, schema)]
        report["workorders.csv"] = probs
    else:
        report["workorders.csv"] = ["missing"]
    return report
