"""Site history: the results of many flights of one site in one GeoPackage, and what changed.

A plant is flown several times a year. :func:`add_flight` stores the results folder of one
``pvscan inspect`` run in a per-site database; :func:`compare` tells, module by module, which
defects are new, persisting, worsened, improved or resolved between two flights;
:func:`import_maintenance` records repairs and replacements so a resolved defect can be told
apart from one that vanished without anyone touching the module (suspicious: a missed
detection, a module not imaged, or a defect that comes and goes); :func:`site_trend` gives
counts, losses and temperatures per flight and per module.

The database
------------
One GeoPackage 1.3 file per site, written with :mod:`sqlite3` following the GeoPackage
encoding (``gpkg_spatial_ref_sys``, ``gpkg_contents``, ``gpkg_geometry_columns``, geometries
as GeoPackage binary: a ``GP`` header with an envelope, then ISO WKB). GIS tools (and
``geopandas.read_file(path, layer="module_results")``) open its spatial layers:

``site_modules``
    the site's module layout as first seen (module_id, table_id, footprint, first flight);
``module_results``
    one row per module and flight (temperatures, ``delta_t_norm_k``, defect, power loss);
``anomalies``
    one row per anomaly and flight (region geometry, defect, severity, losses, priority).

Plain tables: ``flights`` (flight id, site, start, end, conditions and summary as JSON,
content hash, time added, layout differences to the site), ``maintenance_events`` and
``pvscan_metadata`` (key/value; ``schema_version``). A database whose schema version is newer
than :data:`SCHEMA_VERSION` is refused, as is an SQLite file without our metadata.

Every command is one transaction (``BEGIN IMMEDIATE`` with a busy timeout and retries), so two
processes adding flights at the same time both succeed. Adding a flight whose content hash is
already stored writes nothing at all: the file stays byte-identical.

References
----------
.. [1] Open Geospatial Consortium, "OGC GeoPackage Encoding Standard", version 1.3.1,
   OGC 12-128r18, 2021.
.. [2] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
.. [3] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

import csv
import hashlib
import json
import logging
import math
import os
import sqlite3
import struct
import time
import uuid
import warnings
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import shapely
from shapely.geometry import shape
from shapely.geometry.polygon import orient

from pvscan import __version__
from pvscan.errors import HistoryError, PvscanWarning

__all__ = [
    "SCHEMA_VERSION",
    "CHANGE_CLASSES",
    "MAINTENANCE_ACTIONS",
    "LayoutChangeWarning",
    "MaintenanceWarning",
    "FlightResult",
    "LayoutDiff",
    "AddResult",
    "MaintenanceResult",
    "Trend",
    "read_result_dir",
    "content_hash",
    "layout_diff",
    "add_flight",
    "list_flights",
    "load_flight_results",
    "load_maintenance",
    "read_maintenance_csv",
    "import_maintenance",
    "module_states",
    "classify_change",
    "compare",
    "compare_flights",
    "write_changes",
    "normalised_rise",
    "site_trend",
    "write_trend",
]

log = logging.getLogger(__name__)

#: Version of the database layout written by this module.
SCHEMA_VERSION = 1
APPLICATION = "pvscan-site-history"
GPKG_APPLICATION_ID = 0x47504B47  # "GPKG", GeoPackage 1.3.1 [1], Req. 2
GPKG_USER_VERSION = 10301  # GeoPackage 1.3.1 [1], Req. 2

CHANGE_CLASSES = ("new", "persisting", "worsened", "improved", "resolved")
MAINTENANCE_ACTIONS = ("repair", "replace", "clean", "other")
SEVERITY_RANK = {"monitor": 1, "repair": 2, "safety": 3}

_BUSY_TIMEOUT_S = 30.0
_LOCK_RETRIES = 8


class LayoutChangeWarning(PvscanWarning):
    """A flight's module layout differs from the site's (ids added or missing, modules moved)."""


class MaintenanceWarning(PvscanWarning):
    """A maintenance event names a module the site does not have."""


# --------------------------------------------------------------------------------------------
# settings


def _settings(settings: Mapping | None) -> Mapping:
    if settings is not None:
        return settings
    from pvscan.io.settings import load_pipeline

    return load_pipeline()["history"]


# --------------------------------------------------------------------------------------------
# reading a result folder


@dataclass(frozen=True)
class FlightResult:
    """The results of one inspected flight, as read from a ``pvscan inspect`` folder.

    Attributes
    ----------
    flight_id, site : str
    start, end : datetime
        Aware start and end of the flight.
    modules : pandas.DataFrame
        One row per module: module_id, table_id, t_*_c [degC], reference_c [degC],
        delta_t_k [K], delta_t_norm_k [K], defect, severity (worst of its anomalies),
        power_loss_w [W], valid_fraction [-], geometry (shapely, lon/lat).
    anomalies : pandas.DataFrame
        One row per anomaly: anomaly_id, module_id, module_ids (list), defect, severity,
        delta_t_k [K], delta_t_norm_k [K], t_max_c [degC], power_loss_w [W],
        energy_loss_kwh_per_year [kWh/yr], priority, confidence, geometry.
    summary : dict
        ``summary.json`` as written by ``pvscan inspect``.
    source : str
        The folder read.
    """

    flight_id: str
    site: str
    start: datetime
    end: datetime | None
    modules: pd.DataFrame
    anomalies: pd.DataFrame
    summary: dict
    source: str

    @property
    def conditions(self) -> dict:
        c = self.summary.get("conditions")
        return c if isinstance(c, dict) else {}


MODULE_COLUMNS = ("t_mean_c", "t_median_c", "t_p95_c", "t_max_c", "t_min_c", "t_std_k",
                  "valid_fraction", "reference_c", "delta_t_k", "delta_t_norm_k", "power_loss_w")
ANOMALY_COLUMNS = ("delta_t_k", "delta_t_norm_k", "t_max_c", "power_loss_w",
                   "energy_loss_kwh_per_year", "confidence")


def _read_json(path: Path) -> Any:
    from pvscan.io.resources import read_json_file

    return read_json_file(path, HistoryError, "file not found (not a pvscan inspect result folder?)")


def _features(path: Path) -> list[dict]:
    doc = _read_json(path)
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection" \
            or not isinstance(doc.get("features"), list):
        raise HistoryError(f"{path}: not a GeoJSON FeatureCollection")
    return doc["features"]


def _num(value) -> float:
    if value is None:
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _geometries(raw: list, ids: list, path: Path) -> list:
    """Shapely geometries of GeoJSON geometry objects (None stays None), converted in one
    vectorised call; a bad one is named by its feature id."""
    out: list = [None] * len(raw)
    idx = [i for i, g in enumerate(raw) if g is not None]
    if not idx:
        return out
    try:
        geoms = shapely.from_geojson([json.dumps(raw[i]) for i in idx], on_invalid="raise")
    except Exception:  # find and name the bad feature
        for i in idx:
            try:
                shape(raw[i])
            except Exception as exc:  # shapely raises several types for bad coordinates
                raise HistoryError(f"{path}: feature {ids[i]}: invalid geometry ({exc})") from None
        raise HistoryError(f"{path}: invalid geometry") from None
    for i, g in zip(idx, geoms):
        out[i] = g
    return out


def _pick(d: Mapping, *paths: str):
    """First non-empty value among dotted key paths of ``d``."""
    for p in paths:
        cur: Any = d
        for k in p.split("."):
            if isinstance(cur, Mapping) and k in cur:
                cur = cur[k]
            else:
                cur = None
                break
        if cur not in (None, ""):
            return cur
    return None


def _parse_time(value, where: str) -> datetime:
    if isinstance(value, datetime):
        t = value
    else:
        try:
            t = datetime.fromisoformat(str(value).replace("Z", "+00:00"))
        except ValueError:
            raise HistoryError(f"{where}: {value!r} is not an ISO 8601 date-time") from None
    if t.tzinfo is None:
        raise HistoryError(f"{where}: {value!r} has no UTC offset")
    return t


def _as_objects(df: pd.DataFrame, cols: Iterable[str]) -> pd.DataFrame:
    """Text columns as plain Python objects with None for missing (pandas may infer a string
    dtype whose missing value is NaN)."""
    for c in cols:
        df[c] = pd.Series([None if (v is None or (isinstance(v, float) and math.isnan(v))) else v
                           for v in df[c].tolist()], index=df.index, dtype=object)
    return df


def _text(v):
    """A text value, None for missing (None or NaN)."""
    return None if v is None or (isinstance(v, float) and math.isnan(v)) else v


def _worse_severity(a, b):
    ra, rb = SEVERITY_RANK.get(a, 0), SEVERITY_RANK.get(b, 0)
    return a if ra >= rb else b


def read_result_dir(result_dir: str | Path) -> FlightResult:
    """Read the results folder of one ``pvscan inspect`` run.

    Parameters
    ----------
    result_dir : path-like
        Folder holding ``modules.geojson``, ``anomalies.geojson`` and ``summary.json``.

    Returns
    -------
    FlightResult

    Raises
    ------
    HistoryError
        A file is missing or invalid, a feature has no module_id, a module id repeats, or the
        summary has no flight id or start time.
    """
    d = Path(result_dir)
    if not d.is_dir():
        raise HistoryError(f"{d}: result folder not found")
    summary = _read_json(d / "summary.json")
    if not isinstance(summary, dict):
        raise HistoryError(f"{d / 'summary.json'}: not a JSON object")
    fid = _pick(summary, "flight.id", "flight_id", "flight.flight_id")
    if fid is None:
        raise HistoryError(f"{d / 'summary.json'}: missing key flight.id")
    site = _pick(summary, "site.name", "site_name", "site")
    if not isinstance(site, str):
        raise HistoryError(f"{d / 'summary.json'}: missing key site.name")
    start_raw = _pick(summary, "flight.start", "start")
    if start_raw is None:
        raise HistoryError(f"{d / 'summary.json'}: missing key flight.start")
    start = _parse_time(start_raw, f"{d / 'summary.json'}: flight.start")
    end_raw = _pick(summary, "flight.end", "end")
    end = _parse_time(end_raw, f"{d / 'summary.json'}: flight.end") if end_raw is not None else None

    mpath = d / "modules.geojson"
    rows = []
    seen: set[str] = set()
    for i, feat in enumerate(_features(mpath)):
        props = feat.get("properties") or {}
        mid = props.get("module_id")
        if mid in (None, ""):
            raise HistoryError(f"{mpath}: feature {i}: missing property module_id")
        mid = str(mid)
        if mid in seen:
            raise HistoryError(f"{mpath}: module_id {mid} appears twice")
        seen.add(mid)
        row = {"module_id": mid,
               "table_id": None if props.get("table_id") is None else str(props.get("table_id")),
               "defect": props.get("defect") or None, "severity": props.get("severity") or None}
        for c in MODULE_COLUMNS:
            row[c] = _num(props.get(c))
        row["geometry"] = feat.get("geometry")
        rows.append(row)
    modules = pd.DataFrame(rows, columns=["module_id", "table_id", "defect", "severity",
                                          *MODULE_COLUMNS, "geometry"])
    modules["geometry"] = _geometries(list(modules["geometry"]), list(modules["module_id"]), mpath)

    apath = d / "anomalies.geojson"
    arows = []
    for i, feat in enumerate(_features(apath)):
        props = feat.get("properties") or {}
        mid = props.get("module_id")
        if mid in (None, ""):
            raise HistoryError(f"{apath}: feature {i}: missing property module_id")
        aid = props.get("anomaly_id")
        aid = str(aid) if aid not in (None, "") else f"{i + 1}"
        mids = props.get("module_ids")
        if not isinstance(mids, list) or not mids:
            mids = [mid]
        if not props.get("defect"):
            raise HistoryError(f"{apath}: anomaly {aid}: missing property defect")
        row = {"anomaly_id": aid, "module_id": str(mid), "module_ids": [str(m) for m in mids],
               "defect": str(props["defect"]), "severity": props.get("severity") or None,
               "priority": None if props.get("priority") is None else int(props["priority"])}
        for c in ANOMALY_COLUMNS:
            row[c] = _num(props.get(c))
        row["geometry"] = feat.get("geometry")
        arows.append(row)
    anomalies = pd.DataFrame(arows, columns=["anomaly_id", "module_id", "module_ids", "defect",
                                             "severity", "priority", *ANOMALY_COLUMNS, "geometry"])
    anomalies["geometry"] = _geometries(list(anomalies["geometry"]), list(anomalies["anomaly_id"]), apath)
    if anomalies["anomaly_id"].duplicated().any():
        dup = anomalies.loc[anomalies["anomaly_id"].duplicated(), "anomaly_id"].iloc[0]
        raise HistoryError(f"{apath}: anomaly_id {dup} appears twice")

    # worst severity per module, from the anomalies that touch it
    sev: dict[str, str | None] = {}
    for mids, s in zip(anomalies["module_ids"], anomalies["severity"]):
        for m in mids:
            sev[m] = _worse_severity(sev.get(m), s)
    modules["severity"] = [own if own else sev.get(m)
                           for m, own in zip(modules["module_id"], modules["severity"])]
    _as_objects(modules, ("module_id", "table_id", "defect", "severity"))
    _as_objects(anomalies, ("anomaly_id", "module_id", "defect", "severity", "priority"))
    return FlightResult(flight_id=str(fid), site=site, start=start, end=end, modules=modules,
                        anomalies=anomalies, summary=summary, source=str(d))


def _records(df: pd.DataFrame) -> list:
    """Rows as plain lists (NaN -> None, numpy scalars -> Python), geometry as WKB hex."""
    cols = [c for c in df.columns if c != "geometry"]
    body = df[cols].astype(object)
    body = body.where(df[cols].notna(), None)
    geoms = np.array(list(df["geometry"]), dtype=object)
    wkb = [None] * len(df)
    ok = np.array([g is not None for g in geoms], dtype=bool)
    if ok.any():
        hexes = shapely.to_wkb(geoms[ok], hex=True, output_dimension=2, byte_order=1, flavor="iso")
        for i, h in zip(np.flatnonzero(ok), hexes):
            wkb[i] = h
    rows = body.values.tolist()
    for r, w in zip(rows, wkb):
        r.append(w)
    return [cols + ["geometry"]] + rows


def content_hash(result: FlightResult) -> str:
    """SHA-256 of a flight's results: its identity (site, flight id, start, end) and every
    module and anomaly row with its geometry (ISO WKB, hex), in id order.

    The summary's free-form parts (timings, paths) are left out, so the same results give the
    same hash even when written twice; any changed number, defect or geometry gives a new hash.
    """
    h = hashlib.sha256()
    ident = {"site": result.site, "flight_id": result.flight_id,
             "start": result.start.astimezone(timezone.utc).isoformat(),
             "end": result.end.astimezone(timezone.utc).isoformat() if result.end else None}
    h.update(json.dumps(ident, sort_keys=True).encode())
    for name, df, key in (("modules", result.modules, "module_id"),
                          ("anomalies", result.anomalies, "anomaly_id")):
        h.update(name.encode())
        recs = _records(df.sort_values(key, kind="stable").reset_index(drop=True))
        h.update(json.dumps(recs, default=_json_default, allow_nan=False).encode())
    return h.hexdigest()


def _json_default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return None if math.isnan(obj) else float(obj)
    return str(obj)


# --------------------------------------------------------------------------------------------
# GeoPackage binary geometry [1], clause 2.1.3


def _gpkg_blobs(geoms, srs_id: int = 4326) -> list:
    """GeoPackage binary of many geometries (vectorised WKB and envelopes)."""
    arr = np.array(list(geoms), dtype=object)
    out: list = [None] * len(arr)
    ok = np.array([g is not None and not g.is_empty for g in arr], dtype=bool)
    if ok.any():
        wkbs = shapely.to_wkb(arr[ok], byte_order=1, output_dimension=2, flavor="iso")
        bounds = shapely.bounds(arr[ok])
        head = b"GP" + bytes([0, 0x01 | (1 << 1)]) + struct.pack("<i", srs_id)
        for i, w, (minx, miny, maxx, maxy) in zip(np.flatnonzero(ok), wkbs, bounds):
            out[i] = head + struct.pack("<4d", minx, maxx, miny, maxy) + w
    for i in np.flatnonzero(~ok):
        out[i] = _gpkg_blob(arr[i], srs_id)
    return out


def _gpkg_blob(geom, srs_id: int = 4326) -> bytes | None:
    if geom is None:
        return None
    wkb = shapely.to_wkb(geom, byte_order=1, output_dimension=2, flavor="iso")
    if geom.is_empty:
        flags = 0x01 | 0x10  # little endian, empty, no envelope
        return b"GP" + bytes([0, flags]) + struct.pack("<i", srs_id) + wkb
    minx, miny, maxx, maxy = geom.bounds
    flags = 0x01 | (1 << 1)  # little endian header, envelope [minx, maxx, miny, maxy]
    return (b"GP" + bytes([0, flags]) + struct.pack("<i", srs_id)
            + struct.pack("<4d", minx, maxx, miny, maxy) + wkb)


_ENVELOPE_DOUBLES = {0: 0, 1: 4, 2: 6, 3: 6, 4: 8}


def _gpkg_geoms(blobs) -> list:
    """Shapely geometries of many GeoPackage binary blobs (None stays None)."""
    out: list = [None] * len(blobs)
    idx, wkbs = [], []
    for i, blob in enumerate(blobs):
        if blob is None:
            continue
        b = bytes(blob)
        if b[:2] != b"GP":
            raise HistoryError("site history: a stored geometry is not GeoPackage binary")
        env = _ENVELOPE_DOUBLES.get((b[3] >> 1) & 0x07, 0)
        idx.append(i)
        wkbs.append(b[8 + 8 * env:])
    if wkbs:
        for i, g in zip(idx, shapely.from_wkb(np.array(wkbs, dtype=object))):
            out[i] = g
    return out


# --------------------------------------------------------------------------------------------
# the database


_WGS84_WKT = ('GEOGCS["WGS 84",DATUM["WGS_1984",SPHEROID["WGS 84",6378137,298.257223563,'
              'AUTHORITY["EPSG","7030"]],AUTHORITY["EPSG","6326"]],PRIMEM["Greenwich",0,'
              'AUTHORITY["EPSG","8901"]],UNIT["degree",0.0174532925199433,'
              'AUTHORITY["EPSG","9122"]],AXIS["Latitude",NORTH],AXIS["Longitude",EAST],'
              'AUTHORITY["EPSG","4326"]]')

_SCHEMA_SQL = [
    # GeoPackage core tables [1], clause 1.1.2 and 1.1.3
    """CREATE TABLE gpkg_spatial_ref_sys (
        srs_name TEXT NOT NULL, srs_id INTEGER NOT NULL PRIMARY KEY,
        organization TEXT NOT NULL, organization_coordsys_id INTEGER NOT NULL,
        definition TEXT NOT NULL, description TEXT)""",
    """CREATE TABLE gpkg_contents (
        table_name TEXT NOT NULL PRIMARY KEY, data_type TEXT NOT NULL,
        identifier TEXT UNIQUE, description TEXT DEFAULT '',
        last_change DATETIME NOT NULL DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ','now')),
        min_x DOUBLE, min_y DOUBLE, max_x DOUBLE, max_y DOUBLE, srs_id INTEGER,
        CONSTRAINT fk_gc_r_srs_id FOREIGN KEY (srs_id) REFERENCES gpkg_spatial_ref_sys(srs_id))""",
    """CREATE TABLE gpkg_geometry_columns (
        table_name TEXT NOT NULL, column_name TEXT NOT NULL, geometry_type_name TEXT NOT NULL,
        srs_id INTEGER NOT NULL, z TINYINT NOT NULL, m TINYINT NOT NULL,
        CONSTRAINT pk_geom_cols PRIMARY KEY (table_name, column_name),
        CONSTRAINT uk_gc_table_name UNIQUE (table_name),
        CONSTRAINT fk_gc_tn FOREIGN KEY (table_name) REFERENCES gpkg_contents(table_name),
        CONSTRAINT fk_gc_srs FOREIGN KEY (srs_id) REFERENCES gpkg_spatial_ref_sys (srs_id))""",
    """CREATE TABLE pvscan_metadata (key TEXT NOT NULL PRIMARY KEY, value TEXT)""",
    """CREATE TABLE flights (
        fid INTEGER PRIMARY KEY AUTOINCREMENT,
        flight_id TEXT NOT NULL UNIQUE, site TEXT NOT NULL,
        start TEXT NOT NULL, start_utc TEXT NOT NULL, "end" TEXT,
        conditions_json TEXT, summary_json TEXT, content_hash TEXT NOT NULL UNIQUE,
        n_modules INTEGER, n_anomalies INTEGER,
        total_power_loss_w REAL, total_energy_loss_kwh_per_year REAL,
        layout_json TEXT, pvscan_version TEXT, source TEXT, added_at TEXT NOT NULL)""",
    """CREATE TABLE site_modules (
        fid INTEGER PRIMARY KEY AUTOINCREMENT, geom POLYGON,
        module_id TEXT NOT NULL UNIQUE, table_id TEXT, first_flight TEXT NOT NULL)""",
    """CREATE TABLE module_results (
        fid INTEGER PRIMARY KEY AUTOINCREMENT, geom POLYGON,
        flight_id TEXT NOT NULL REFERENCES flights(flight_id), module_id TEXT NOT NULL,
        table_id TEXT, t_mean_c REAL, t_median_c REAL, t_p95_c REAL, t_max_c REAL,
        t_min_c REAL, t_std_k REAL, valid_fraction REAL, reference_c REAL, delta_t_k REAL,
        delta_t_norm_k REAL, defect TEXT, severity TEXT, power_loss_w REAL,
        UNIQUE (flight_id, module_id))""",
    """CREATE TABLE anomalies (
        fid INTEGER PRIMARY KEY AUTOINCREMENT, geom GEOMETRY,
        flight_id TEXT NOT NULL REFERENCES flights(flight_id), anomaly_id TEXT NOT NULL,
        module_id TEXT NOT NULL, module_ids TEXT NOT NULL, defect TEXT NOT NULL,
        severity TEXT, delta_t_k REAL, delta_t_norm_k REAL, t_max_c REAL, power_loss_w REAL,
        energy_loss_kwh_per_year REAL, priority INTEGER, confidence REAL,
        UNIQUE (flight_id, anomaly_id))""",
    """CREATE TABLE maintenance_events (
        fid INTEGER PRIMARY KEY AUTOINCREMENT, date TEXT NOT NULL, module_id TEXT NOT NULL,
        action TEXT NOT NULL, note TEXT, event_hash TEXT NOT NULL UNIQUE, source TEXT)""",
    "CREATE INDEX idx_module_results_module ON module_results(module_id)",
    "CREATE INDEX idx_anomalies_flight ON anomalies(flight_id)",
]

_LAYERS = (
    ("site_modules", "features", "geom", "POLYGON", "module layout of the site"),
    ("module_results", "features", "geom", "POLYGON", "per-module results of every flight"),
    ("anomalies", "features", "geom", "GEOMETRY", "anomalies of every flight"),
    ("flights", "attributes", None, None, "flights stored"),
    ("maintenance_events", "attributes", None, None, "repairs, replacements, cleaning"),
)


def _now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")[:-4] + "Z"


def _create_schema(con: sqlite3.Connection, site: str) -> None:
    now = _now()
    con.execute(f"PRAGMA application_id = {GPKG_APPLICATION_ID}")
    con.execute(f"PRAGMA user_version = {GPKG_USER_VERSION}")
    for sql in _SCHEMA_SQL:
        con.execute(sql)
    con.executemany(
        "INSERT INTO gpkg_spatial_ref_sys VALUES (?, ?, ?, ?, ?, ?)",
        [("WGS 84 geodetic", 4326, "EPSG", 4326, _WGS84_WKT, "longitude/latitude (RFC 7946)"),
         ("Undefined cartesian SRS", -1, "NONE", -1, "undefined", "undefined cartesian"),
         ("Undefined geographic SRS", 0, "NONE", 0, "undefined", "undefined geographic")])
    for name, kind, col, gtype, desc in _LAYERS:
        con.execute("INSERT INTO gpkg_contents (table_name, data_type, identifier, description,"
                    " last_change, srs_id) VALUES (?, ?, ?, ?, ?, ?)",
                    (name, kind, name, desc, now, 4326 if col else None))
        if col:
            con.execute("INSERT INTO gpkg_geometry_columns VALUES (?, ?, ?, 4326, 0, 0)",
                        (name, col, gtype))
    con.executemany("INSERT INTO pvscan_metadata VALUES (?, ?)",
                    [("application", APPLICATION), ("schema_version", str(SCHEMA_VERSION)),
                     ("site", site), ("created_with", __version__), ("created_at", now)])


_SQLITE_MAGIC = b"SQLite format 3\x00"


def _absent_or_empty(path: Path) -> bool:
    try:
        return path.stat().st_size == 0
    except FileNotFoundError:
        return True
    except OSError as exc:
        raise HistoryError(f"{path}: cannot read: {exc.strerror}") from None


def _create_database(path: Path, site: str) -> bool:
    """Create the site database at ``path`` when it is missing (or an empty file).

    Several processes may add the first flights of a site at once. The new database is built
    in a temporary sibling (schema and metadata, committed) and renamed into place under an
    exclusive lock, so that ``path`` never shows a half-created database: SQLite writes the
    pages of a big first transaction before the header page, and another process reading
    the file meanwhile would take it for a foreign file. Whoever holds the lock checks again
    whether the file is still missing; the others then use it with the usual transaction.

    Returns
    -------
    bool
        True when this call created the database.
    """
    from pvscan.io.locking import exclusive_lock

    if not _absent_or_empty(path):
        return False
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        lock = path.with_name(f".{path.name}.lock")
        with exclusive_lock(lock, remove=True):
            if not _absent_or_empty(path):
                return False
            tmp = path.with_name(f".{path.name}.new-{uuid.uuid4().hex[:8]}")
            try:
                con = sqlite3.connect(str(tmp), isolation_level=None)
                try:
                    con.execute("BEGIN IMMEDIATE")
                    _create_schema(con, site)
                    con.execute("COMMIT")
                finally:
                    con.close()
                with open(tmp, "rb+") as fh:
                    os.fsync(fh.fileno())
                os.replace(tmp, path)
            except BaseException:
                for leftover in (tmp, tmp.with_name(tmp.name + "-journal")):
                    try:
                        os.unlink(leftover)
                    except OSError:
                        pass
                raise
    except sqlite3.Error as exc:
        raise HistoryError(f"{path}: cannot create the site history: {exc}") from None
    except OSError as exc:
        raise HistoryError(f"{path}: cannot create the site history: {exc.strerror or exc}") from None
    log.info("%s: created the site history of %s", path, site)
    return True


def _check_file(path: Path, must_exist: bool) -> bool:
    """True when ``path`` holds (or may become) a database; raise for a foreign file."""
    if not path.exists():
        if must_exist:
            raise HistoryError(f"{path}: site history not found (create it with `pvscan history add`)")
        return False
    if path.is_dir():
        raise HistoryError(f"{path}: is a folder, not a site history file")
    try:
        with open(path, "rb") as fh:
            head = fh.read(len(_SQLITE_MAGIC))
    except OSError as exc:
        raise HistoryError(f"{path}: cannot read: {exc.strerror}") from None
    if head and head != _SQLITE_MAGIC:
        raise HistoryError(f"{path}: not an SQLite/GeoPackage file (corrupt or foreign); left unchanged")
    if not head and must_exist:
        raise HistoryError(f"{path}: empty file, not a site history")
    return bool(head)


def _check_metadata(con: sqlite3.Connection, path: Path) -> dict | None:
    """Our metadata, None for an empty database; raise for a foreign or newer one."""
    try:
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    except sqlite3.DatabaseError as exc:
        raise HistoryError(f"{path}: not a readable SQLite database ({exc}); left unchanged") from None
    if not tables:
        return None
    if "pvscan_metadata" not in tables:
        raise HistoryError(f"{path}: an SQLite file without pvscan site-history metadata "
                           "(foreign database); left unchanged")
    try:
        meta = dict(con.execute("SELECT key, value FROM pvscan_metadata"))
    except sqlite3.DatabaseError as exc:
        raise HistoryError(f"{path}: unreadable pvscan_metadata table ({exc}); left unchanged") from None
    if meta.get("application") != APPLICATION:
        raise HistoryError(f"{path}: pvscan_metadata names application {meta.get('application')!r}, "
                           f"not {APPLICATION!r}; left unchanged")
    raw = meta.get("schema_version")
    try:
        version = int(raw)
    except (TypeError, ValueError):
        raise HistoryError(f"{path}: unknown site-history schema_version {raw!r}; left unchanged") from None
    if version > SCHEMA_VERSION:
        raise HistoryError(f"{path}: site-history schema_version {version} is newer than this pvscan "
                           f"({__version__}) supports ({SCHEMA_VERSION}); upgrade pvscan")
    if version < 1:
        raise HistoryError(f"{path}: unknown site-history schema_version {version}; left unchanged")
    return meta


def _connect(path: Path) -> sqlite3.Connection:
    try:
        con = sqlite3.connect(str(path), timeout=_BUSY_TIMEOUT_S, isolation_level=None)
    except sqlite3.Error as exc:
        raise HistoryError(f"{path}: cannot open: {exc}") from None
    con.execute(f"PRAGMA busy_timeout = {int(_BUSY_TIMEOUT_S * 1000)}")
    return con


def _begin(con: sqlite3.Connection, path: Path, immediate: bool) -> None:
    stmt = "BEGIN IMMEDIATE" if immediate else "BEGIN"
    delay = 0.05
    for attempt in range(_LOCK_RETRIES):
        try:
            con.execute(stmt)
            return
        except sqlite3.OperationalError as exc:
            if "locked" not in str(exc) and "busy" not in str(exc):
                raise HistoryError(f"{path}: cannot start a transaction: {exc}") from None
            log.info("%s: database busy, retry %d", path, attempt + 1)
            time.sleep(delay)
            delay = min(delay * 2, 2.0)
        except sqlite3.DatabaseError as exc:
            raise HistoryError(f"{path}: not a readable SQLite database ({exc}); left unchanged") from None
    raise HistoryError(f"{path}: database stayed locked by another process; try again")


class _Session:
    """One transaction on the site database: ``with _Session(path, write=True) as (con, meta)``.

    Commits on success, rolls back on any error or when :meth:`discard` was called (nothing
    written: the file stays byte-identical).
    """

    def __init__(self, path: str | Path, *, write: bool, create: bool = False):
        self.path = Path(path)
        self.write = write
        self.create = create
        self._discard = False

    def discard(self) -> None:
        self._discard = True

    def __enter__(self):
        existed = _check_file(self.path, must_exist=not self.create)
        if not self.write:
            uri = self.path.resolve().as_uri() + "?mode=ro"
            try:
                self.con = sqlite3.connect(uri, uri=True, timeout=_BUSY_TIMEOUT_S, isolation_level=None)
            except sqlite3.Error as exc:
                raise HistoryError(f"{self.path}: cannot open: {exc}") from None
        else:
            if not existed:
                self.path.parent.mkdir(parents=True, exist_ok=True)
            self.con = _connect(self.path)
        try:
            _begin(self.con, self.path, immediate=self.write)
            self.meta = _check_metadata(self.con, self.path)
            if self.meta is None and not self.create:
                raise HistoryError(f"{self.path}: empty database, not a site history")
        except BaseException:
            self._close(rollback=True)
            raise
        return self

    def _close(self, rollback: bool) -> None:
        try:
            if self.con.in_transaction:
                self.con.execute("ROLLBACK" if rollback else "COMMIT")
        finally:
            self.con.close()

    def __exit__(self, exc_type, exc, tb):
        rollback = exc_type is not None or self._discard or not self.write
        try:
            self._close(rollback)
        except sqlite3.Error as err:
            if exc_type is None:
                raise HistoryError(f"{self.path}: cannot commit: {err}") from None
        if exc_type is not None and issubclass(exc_type, sqlite3.Error):
            # rolled back: nothing of this command was written
            raise HistoryError(f"{self.path}: database error ({exc}); nothing written") from None
        return False


# --------------------------------------------------------------------------------------------
# layout comparison


@dataclass(frozen=True)
class LayoutDiff:
    """How a flight's module layout differs from the site's.

    Attributes
    ----------
    added : tuple of str
        Module ids in the flight but not (yet) in the site layout.
    missing : tuple of str
        Module ids of the site layout absent from the flight.
    moved : tuple of (str, float)
        Module ids whose footprint centroid moved by more than the tolerance, with the
        distance [m].
    tolerance_m : float
        The tolerance used [m].
    """

    added: tuple[str, ...] = ()
    missing: tuple[str, ...] = ()
    moved: tuple[tuple[str, float], ...] = ()
    tolerance_m: float = 0.0

    @property
    def same(self) -> bool:
        return not (self.added or self.missing or self.moved)

    def describe(self, limit: int = 5) -> str:
        def ids(xs):
            xs = list(xs)
            more = f" (+{len(xs) - limit} more)" if len(xs) > limit else ""
            return ", ".join(xs[:limit]) + more
        parts = []
        if self.added:
            parts.append(f"{len(self.added)} module(s) not in the site layout: {ids(self.added)}")
        if self.missing:
            parts.append(f"{len(self.missing)} site module(s) missing: {ids(self.missing)}")
        if self.moved:
            parts.append(f"{len(self.moved)} module(s) moved more than {self.tolerance_m:g} m: "
                         f"{ids(m for m, _ in self.moved)}")
        return "; ".join(parts) if parts else "layout matches the site"

    def to_dict(self) -> dict:
        return {"added": list(self.added), "missing": list(self.missing),
                "moved": [[m, round(d, 3)] for m, d in self.moved], "tolerance_m": self.tolerance_m}


def layout_diff(site: pd.DataFrame, flight: pd.DataFrame, tolerance_m: float) -> LayoutDiff:
    """Compare a flight's modules with the site layout.

    Parameters
    ----------
    site, flight : pandas.DataFrame
        Columns ``module_id`` and ``geometry`` (shapely, lon/lat [deg]).
    tolerance_m : float
        Largest centroid displacement still counted as the same place [m].

    Returns
    -------
    LayoutDiff
    """
    from pyproj import Geod

    s = dict(zip(site["module_id"], site["geometry"]))
    f = dict(zip(flight["module_id"], flight["geometry"]))
    added = tuple(sorted(set(f) - set(s)))
    missing = tuple(sorted(set(s) - set(f)))
    common = sorted(m for m in set(s) & set(f) if s[m] is not None and f[m] is not None)
    moved: list[tuple[str, float]] = []
    if common:
        ca = shapely.centroid(np.array([s[m] for m in common]))
        cb = shapely.centroid(np.array([f[m] for m in common]))
        _, _, dist = Geod(ellps="WGS84").inv(shapely.get_x(ca), shapely.get_y(ca),
                                             shapely.get_x(cb), shapely.get_y(cb))
        moved = [(m, float(d)) for m, d in zip(common, np.atleast_1d(dist)) if d > tolerance_m]
    return LayoutDiff(added, missing, tuple(moved), float(tolerance_m))


# --------------------------------------------------------------------------------------------
# add


@dataclass(frozen=True)
class AddResult:
    """What :func:`add_flight` did.

    Attributes
    ----------
    flight_id : str
    status : str
        ``"added"``, ``"unchanged"`` (the same results were already stored: nothing written)
        or ``"replaced"``.
    content_hash : str
    n_modules, n_anomalies : int
    layout : LayoutDiff
    created : bool
        True when this call created the database.
    """

    flight_id: str
    status: str
    content_hash: str
    n_modules: int
    n_anomalies: int
    layout: LayoutDiff
    created: bool = False


def _f(x):
    if x is None:
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(v) else v


def _update_extent(con: sqlite3.Connection, table: str, geoms: list, now: str) -> None:
    """Grow the layer's bounding box in gpkg_contents by the geometries just inserted."""
    geoms = [g for g in geoms if g is not None and not g.is_empty]
    row = con.execute("SELECT min_x, min_y, max_x, max_y FROM gpkg_contents WHERE table_name=?",
                      (table,)).fetchone()
    box = [v for v in row] if row else [None] * 4
    if geoms:
        minx, miny, maxx, maxy = (float(v) for v in shapely.total_bounds(np.array(geoms, dtype=object)))
        box = [minx if box[0] is None else min(box[0], minx), miny if box[1] is None else min(box[1], miny),
               maxx if box[2] is None else max(box[2], maxx), maxy if box[3] is None else max(box[3], maxy)]
    con.execute("UPDATE gpkg_contents SET min_x=?, min_y=?, max_x=?, max_y=?, last_change=? "
                "WHERE table_name=?", (*box, now, table))


def _totals(result: FlightResult) -> tuple[float | None, float | None]:
    p = result.modules["power_loss_w"]
    power = float(np.nansum(p)) if p.notna().any() else None
    if power is None and len(result.anomalies):
        pa = result.anomalies["power_loss_w"]
        power = float(np.nansum(pa)) if pa.notna().any() else None
    e = result.anomalies["energy_loss_kwh_per_year"]
    energy = float(np.nansum(e)) if e.notna().any() else (0.0 if len(result.anomalies) == 0 else None)
    if power is None and len(result.anomalies) == 0:
        power = 0.0
    return power, energy


def add_flight(db_path: str | Path, result_dir: str | Path, *, replace: bool = False,
               settings: Mapping | None = None,
               progress: Callable[[str, int, int], None] | None = None) -> AddResult:
    """Store one inspected flight in the site history (created when it does not exist).

    Parameters
    ----------
    db_path : path-like
        The site's GeoPackage.
    result_dir : path-like
        Results folder of ``pvscan inspect``.
    replace : bool
        Replace a stored flight of the same id whose results differ (e.g. re-inspected with
        other settings). Without it such a flight is refused.
    settings : mapping, optional
        The ``[history]`` pipeline section (default: ``load_pipeline()["history"]``).
    progress : callable, optional
        ``progress(stage, done, total)``.

    Returns
    -------
    AddResult

    Raises
    ------
    HistoryError
        Unreadable results; a foreign, corrupt or newer database; a flight of another site;
        a flight id already stored with other results (without ``replace``); the same results
        stored under another flight id.

    Warns
    -----
    LayoutChangeWarning
        When the flight's module ids or positions differ from the site layout.

    Notes
    -----
    When the same results are already stored (same content hash) nothing is written and the
    file stays byte-identical.
    """
    cfg = _settings(settings)
    result = read_result_dir(result_dir)
    digest = content_hash(result)
    path = Path(db_path)
    if progress:
        progress("history add", 0, 3)
    made = _create_database(path, result.site)
    with _Session(path, write=True, create=True) as s:
        con = s.con
        created = made or s.meta is None
        if s.meta is None:  # an SQLite file without tables: make it the site history
            _create_schema(con, result.site)
            site_name = result.site
        else:
            site_name = s.meta.get("site")
        if site_name != result.site:
            raise HistoryError(f"{result.source}: flight {result.flight_id} is of site {result.site!r}, "
                               f"but {path} holds site {site_name!r}")
        row = con.execute("SELECT flight_id FROM flights WHERE content_hash=?", (digest,)).fetchone()
        if row is not None:
            if row[0] != result.flight_id:
                raise HistoryError(f"{result.source}: the same results are already stored as flight "
                                   f"{row[0]!r} (not {result.flight_id!r})")
            s.discard()
            log.info("%s: flight %s already stored (same content); nothing written", path, row[0])
            return AddResult(result.flight_id, "unchanged", digest, len(result.modules),
                             len(result.anomalies), LayoutDiff(tolerance_m=cfg["layout_tolerance_m"]))
        status = "added"
        old = con.execute("SELECT content_hash FROM flights WHERE flight_id=?",
                          (result.flight_id,)).fetchone()
        if old is not None:
            if not replace:
                raise HistoryError(f"{result.source}: flight {result.flight_id} is already stored in "
                                   f"{path} with other results; use --replace to replace it")
            for t in ("anomalies", "module_results", "flights"):
                con.execute(f"DELETE FROM {t} WHERE flight_id=?", (result.flight_id,))
            status = "replaced"
        if progress:
            progress("history add", 1, 3)

        site_rows = con.execute("SELECT module_id, geom FROM site_modules").fetchall()
        site = pd.DataFrame({"module_id": [r[0] for r in site_rows],
                             "geometry": _gpkg_geoms([r[1] for r in site_rows])})
        if site.empty:
            diff = LayoutDiff(tolerance_m=float(cfg["layout_tolerance_m"]))
        else:
            diff = layout_diff(site, result.modules, float(cfg["layout_tolerance_m"]))
        if not diff.same:
            msg = f"{result.source}: flight {result.flight_id}: {diff.describe()}"
            warnings.warn(msg, LayoutChangeWarning, stacklevel=2)
        now = _now()
        new_ids = set(diff.added) if not site.empty else set(result.modules["module_id"])
        con.executemany(
            "INSERT INTO site_modules (geom, module_id, table_id, first_flight) VALUES (?, ?, ?, ?)",
            [(b, m, t, result.flight_id)
             for m, t, b in zip(result.modules["module_id"], result.modules["table_id"],
                                _gpkg_blobs(result.modules["geometry"])) if m in new_ids])
        power, energy = _totals(result)
        con.execute(
            'INSERT INTO flights (flight_id, site, start, start_utc, "end", conditions_json, '
            "summary_json, content_hash, n_modules, n_anomalies, total_power_loss_w, "
            "total_energy_loss_kwh_per_year, layout_json, pvscan_version, source, added_at) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (result.flight_id, result.site, result.start.isoformat(),
             result.start.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
             result.end.isoformat() if result.end else None,
             json.dumps(result.conditions, sort_keys=True),
             json.dumps(result.summary, sort_keys=True), digest, len(result.modules),
             len(result.anomalies), power, energy, json.dumps(diff.to_dict(), sort_keys=True),
             str(_pick(result.summary, "pvscan_version", "pvscan.version", "version") or ""),
             str(Path(result.source).resolve()), now))
        m = result.modules
        con.executemany(
            "INSERT INTO module_results (geom, flight_id, module_id, table_id, t_mean_c, t_median_c, "
            "t_p95_c, t_max_c, t_min_c, t_std_k, valid_fraction, reference_c, delta_t_k, "
            "delta_t_norm_k, defect, severity, power_loss_w) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [(blob, result.flight_id, r["module_id"], r["table_id"],
              _f(r["t_mean_c"]), _f(r["t_median_c"]), _f(r["t_p95_c"]), _f(r["t_max_c"]),
              _f(r["t_min_c"]), _f(r["t_std_k"]), _f(r["valid_fraction"]), _f(r["reference_c"]),
              _f(r["delta_t_k"]), _f(r["delta_t_norm_k"]), r["defect"], r["severity"],
              _f(r["power_loss_w"]))
             for r, blob in zip(m.to_dict("records"), _gpkg_blobs(m["geometry"]))])
        con.executemany(
            "INSERT INTO anomalies (geom, flight_id, anomaly_id, module_id, module_ids, defect, "
            "severity, delta_t_k, delta_t_norm_k, t_max_c, power_loss_w, energy_loss_kwh_per_year, "
            "priority, confidence) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            [(blob, result.flight_id, r["anomaly_id"], r["module_id"],
              json.dumps(r["module_ids"]), r["defect"], r["severity"], _f(r["delta_t_k"]),
              _f(r["delta_t_norm_k"]), _f(r["t_max_c"]), _f(r["power_loss_w"]),
              _f(r["energy_loss_kwh_per_year"]), r["priority"], _f(r["confidence"]))
             for r, blob in zip(result.anomalies.to_dict("records"),
                                _gpkg_blobs(result.anomalies["geometry"]))])
        _update_extent(con, "site_modules", [g for m, g in zip(result.modules["module_id"],
                                                                result.modules["geometry"])
                                             if m in new_ids], now)
        _update_extent(con, "module_results", list(result.modules["geometry"]), now)
        _update_extent(con, "anomalies", list(result.anomalies["geometry"]), now)
        for t in ("flights",):
            con.execute("UPDATE gpkg_contents SET last_change=? WHERE table_name=?", (now, t))
        if progress:
            progress("history add", 2, 3)
    if progress:
        progress("history add", 3, 3)
    log.info("%s: flight %s %s (%d modules, %d anomalies)", path, result.flight_id, status,
             len(result.modules), len(result.anomalies))
    return AddResult(result.flight_id, status, digest, len(result.modules), len(result.anomalies),
                     diff, created)


# --------------------------------------------------------------------------------------------
# reading back


def list_flights(db_path: str | Path) -> pd.DataFrame:
    """The flights stored, oldest first.

    Returns
    -------
    pandas.DataFrame
        Columns flight_id, site, start, end, n_modules, n_anomalies, total_power_loss_w [W],
        total_energy_loss_kwh_per_year [kWh/yr], layout (one-line description), content_hash,
        added_at.
    """
    with _Session(db_path, write=False) as s:
        rows = s.con.execute(
            'SELECT flight_id, site, start, "end", n_modules, n_anomalies, total_power_loss_w, '
            "total_energy_loss_kwh_per_year, layout_json, content_hash, added_at "
            "FROM flights ORDER BY start_utc, flight_id").fetchall()
    cols = ["flight_id", "site", "start", "end", "n_modules", "n_anomalies", "total_power_loss_w",
            "total_energy_loss_kwh_per_year", "layout", "content_hash", "added_at"]
    df = pd.DataFrame(rows, columns=cols)
    df["layout"] = [LayoutDiff(tuple(d["added"]), tuple(d["missing"]),
                               tuple((m, x) for m, x in d["moved"]), d["tolerance_m"]).describe()
                    for d in (json.loads(x) for x in df["layout"])] if len(df) else []
    return df


def _flight_order(con) -> list[tuple[str, str]]:
    return con.execute("SELECT flight_id, start FROM flights ORDER BY start_utc, flight_id").fetchall()


def _read_flight(con, flight_id: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    mcols = ["module_id", "table_id", *MODULE_COLUMNS, "defect", "severity"]
    rows = con.execute(f"SELECT geom, {', '.join(mcols)} FROM module_results WHERE flight_id=? "
                       "ORDER BY module_id", (flight_id,)).fetchall()
    modules = pd.DataFrame([r[1:] for r in rows], columns=mcols)
    modules["geometry"] = _gpkg_geoms([r[0] for r in rows])
    for c in MODULE_COLUMNS:
        modules[c] = pd.to_numeric(modules[c]).astype(float)
    _as_objects(modules, ("module_id", "table_id", "defect", "severity"))
    acols = ["anomaly_id", "module_id", "module_ids", "defect", "severity", "priority", *ANOMALY_COLUMNS]
    rows = con.execute(f"SELECT geom, {', '.join(acols)} FROM anomalies WHERE flight_id=? "
                       "ORDER BY fid", (flight_id,)).fetchall()
    anomalies = pd.DataFrame([r[1:] for r in rows], columns=acols)
    anomalies["module_ids"] = [json.loads(x) for x in anomalies["module_ids"]]
    anomalies["geometry"] = _gpkg_geoms([r[0] for r in rows])
    for c in ANOMALY_COLUMNS:
        anomalies[c] = pd.to_numeric(anomalies[c]).astype(float)
    _as_objects(anomalies, ("anomaly_id", "module_id", "defect", "severity", "priority"))
    return modules, anomalies


def load_flight_results(db_path: str | Path, flight_id: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The stored modules and anomalies of one flight (columns as in :class:`FlightResult`)."""
    with _Session(db_path, write=False) as s:
        if s.con.execute("SELECT 1 FROM flights WHERE flight_id=?", (flight_id,)).fetchone() is None:
            raise HistoryError(f"{db_path}: no flight {flight_id!r}")
        return _read_flight(s.con, flight_id)


# --------------------------------------------------------------------------------------------
# maintenance


@dataclass(frozen=True)
class MaintenanceResult:
    """What :func:`import_maintenance` did: events read, newly stored, already present, and
    module ids the site does not know."""

    n_read: int
    n_added: int
    n_present: int
    unknown_modules: tuple[str, ...] = ()


def _parse_event_date(value: str, where: str) -> str:
    v = (value or "").strip()
    if not v:
        raise HistoryError(f"{where}: empty date")
    try:
        if len(v) == 10:
            return date.fromisoformat(v).isoformat()
        t = datetime.fromisoformat(v.replace("Z", "+00:00"))
    except ValueError:
        raise HistoryError(f"{where}: date {v!r} is not ISO 8601 (YYYY-MM-DD or a date-time)") from None
    return t.isoformat()


def read_maintenance_csv(path: str | Path) -> pd.DataFrame:
    """Read a maintenance log.

    Parameters
    ----------
    path : path-like
        CSV with a header row and columns ``date`` (ISO 8601 date or date-time), ``module_id``,
        ``action`` (repair | replace | clean | other) and an optional ``note``.

    Returns
    -------
    pandas.DataFrame
        Columns date (normalised ISO 8601 text), module_id, action, note.

    Raises
    ------
    HistoryError
        Missing file or column, bad date, unknown action, empty module_id (message names the
        line).
    """
    p = Path(path)
    try:
        with open(p, encoding="utf-8-sig", newline="") as fh:
            reader = csv.DictReader(fh)
            fields = [f.strip() for f in (reader.fieldnames or [])]
            missing = [c for c in ("date", "module_id", "action") if c not in fields]
            if missing:
                raise HistoryError(f"{p}: missing column {missing[0]} (needs date, module_id, action, note)")
            rows = []
            for line, raw in enumerate(reader, start=2):
                rec = {(k or "").strip(): (v or "").strip() if isinstance(v, str) else v
                       for k, v in raw.items()}
                if not any(rec.get(c) for c in ("date", "module_id", "action")):
                    continue  # blank line
                where = f"{p}: line {line}"
                d = _parse_event_date(rec.get("date", ""), where)
                mid = rec.get("module_id", "")
                if not mid:
                    raise HistoryError(f"{where}: empty module_id")
                action = rec.get("action", "").lower()
                if action not in MAINTENANCE_ACTIONS:
                    raise HistoryError(f"{where}: action {rec.get('action')!r} is not one of "
                                       f"{', '.join(MAINTENANCE_ACTIONS)}")
                rows.append({"date": d, "module_id": mid, "action": action,
                             "note": rec.get("note") or ""})
    except FileNotFoundError:
        raise HistoryError(f"{p}: maintenance file not found") from None
    except UnicodeDecodeError:
        raise HistoryError(f"{p}: not UTF-8 text") from None
    except csv.Error as exc:
        raise HistoryError(f"{p}: not valid CSV: {exc}") from None
    return pd.DataFrame(rows, columns=["date", "module_id", "action", "note"])


def _event_hash(rec: Mapping) -> str:
    key = json.dumps([rec["date"], rec["module_id"], rec["action"], rec["note"]])
    return hashlib.sha256(key.encode()).hexdigest()


def import_maintenance(db_path: str | Path, events_csv: str | Path) -> MaintenanceResult:
    """Import repairs, replacements and cleaning into the site history (idempotent).

    An event already stored (same date, module, action and note) is skipped; when nothing is
    new, nothing is written and the file stays byte-identical.

    Warns
    -----
    MaintenanceWarning
        For module ids the site layout does not contain (they are stored anyway).
    """
    events = read_maintenance_csv(events_csv)
    with _Session(db_path, write=True) as s:
        known = {r[0] for r in s.con.execute("SELECT module_id FROM site_modules")}
        unknown = tuple(sorted(set(events["module_id"]) - known))
        if unknown:
            more = f" (+{len(unknown) - 5} more)" if len(unknown) > 5 else ""
            warnings.warn(f"{events_csv}: module id(s) not in the site layout: "
                          f"{', '.join(unknown[:5])}{more}", MaintenanceWarning, stacklevel=2)
        added = 0
        for rec in events.to_dict("records"):
            cur = s.con.execute(
                "INSERT OR IGNORE INTO maintenance_events (date, module_id, action, note, event_hash, "
                "source) VALUES (?, ?, ?, ?, ?, ?)",
                (rec["date"], rec["module_id"], rec["action"], rec["note"], _event_hash(rec),
                 Path(events_csv).name))
            added += cur.rowcount
        if added == 0:
            s.discard()
        else:
            s.con.execute("UPDATE gpkg_contents SET last_change=? WHERE table_name='maintenance_events'",
                          (_now(),))
    return MaintenanceResult(len(events), added, len(events) - added, unknown)


def load_maintenance(db_path: str | Path) -> pd.DataFrame:
    """Stored maintenance events (date, module_id, action, note), by date."""
    with _Session(db_path, write=False) as s:
        rows = s.con.execute("SELECT date, module_id, action, note FROM maintenance_events "
                             "ORDER BY date, module_id, fid").fetchall()
    return pd.DataFrame(rows, columns=["date", "module_id", "action", "note"])


# --------------------------------------------------------------------------------------------
# change detection


def module_states(modules: pd.DataFrame, anomalies: pd.DataFrame,
                  pattern_rank: Mapping[str, int]) -> pd.DataFrame:
    """The worst anomaly of each module of one flight.

    A module's anomalies are those whose ``module_ids`` include it (an open string counts for
    every module of the run), plus the module's own ``defect`` when no anomaly names it. The
    worst is the most severe pattern (``pattern_rank``), then severity, then the largest
    ``delta_t_norm_k``.

    Returns
    -------
    pandas.DataFrame
        Indexed by module_id: defect, severity, delta_t_norm_k [K], n_anomalies, defects
        (all patterns, comma-separated).
    """
    per: dict[str, list[tuple]] = {}
    for rec in anomalies.to_dict("records"):
        for m in rec["module_ids"]:
            per.setdefault(m, []).append((rec["defect"], rec["severity"], rec["delta_t_norm_k"]))
    sick = modules[modules["defect"].notna()] if "defect" in modules.columns else modules.iloc[:0]
    for rec in sick.to_dict("records"):
        d = rec.get("defect")
        if d and not any(x[0] == d for x in per.get(rec["module_id"], [])):
            per.setdefault(rec["module_id"], []).append((d, rec.get("severity"), rec["delta_t_norm_k"]))

    def key(x):
        dt = x[2] if x[2] is not None and not (isinstance(x[2], float) and math.isnan(x[2])) else -math.inf
        return (pattern_rank.get(x[0], 0), SEVERITY_RANK.get(x[1], 0), dt)

    rows = []
    for m, items in per.items():
        worst = max(items, key=key)
        rows.append({"module_id": m, "defect": worst[0], "severity": worst[1],
                     "delta_t_norm_k": _num(worst[2]), "n_anomalies": len(items),
                     "defects": ",".join(sorted({x[0] for x in items}))})
    return pd.DataFrame(rows, columns=["module_id", "defect", "severity", "delta_t_norm_k",
                                       "n_anomalies", "defects"]).set_index("module_id")


def classify_change(defect_before: str | None, dt_before: float, defect_after: str | None,
                    dt_after: float, *, pattern_rank: Mapping[str, int], margin_k: float,
                    margin_rel: float) -> str | None:
    """Change class of one module between two flights.

    Parameters
    ----------
    defect_before, defect_after : str or None
        Worst defect pattern in each flight (None: healthy).
    dt_before, dt_after : float
        Its ``delta_t_norm_k`` [K] (normalised to reference irradiance and wind, so flights of
        different seasons compare fairly).
    pattern_rank : mapping
        Severity order of the patterns (higher = more severe).
    margin_k, margin_rel : float
        A persisting defect is worsened or improved only when ``|after - before|`` exceeds
        ``max(margin_k, margin_rel * |before|)`` [K].

    Returns
    -------
    str or None
        ``new``, ``persisting``, ``worsened``, ``improved``, ``resolved``; None when the module
        is healthy in both flights.

    Notes
    -----
    A change to a more severe pattern (e.g. hot cell to bypassed substring) is ``worsened``
    and to a less severe one ``improved``, whatever the temperatures; for the same pattern
    rank the normalised temperature difference decides. A NaN temperature on either side
    leaves a persisting defect ``persisting``.
    """
    if defect_before is None and defect_after is None:
        return None
    if defect_before is None:
        return "new"
    if defect_after is None:
        return "resolved"
    rb, ra = pattern_rank.get(defect_before, 0), pattern_rank.get(defect_after, 0)
    if ra > rb:
        return "worsened"
    if ra < rb:
        return "improved"
    if math.isnan(dt_before) or math.isnan(dt_after):
        return "persisting"
    margin = max(margin_k, margin_rel * abs(dt_before))
    diff = dt_after - dt_before
    if diff > margin:
        return "worsened"
    if diff < -margin:
        return "improved"
    return "persisting"


def _event_between(event_date: str, start_before: datetime, start_after: datetime) -> bool:
    """True when a maintenance event falls between two flights (date-only events count on the
    flights' local calendar days, both ends included)."""
    if len(event_date) == 10:
        d = date.fromisoformat(event_date)
        return start_before.date() <= d <= start_after.date()
    t = datetime.fromisoformat(event_date)
    if t.tzinfo is None:
        t = t.replace(tzinfo=start_after.tzinfo)
    return start_before <= t <= start_after


# which actions can explain that a defect pattern disappeared
def _moved_m(a, b) -> float:
    """Geodesic distance [m] between the centroids of a module's two footprints (lon/lat)."""
    if a is None or b is None:
        return math.nan
    from pyproj import Geod

    ca, cb = a.centroid, b.centroid
    return float(Geod(ellps="WGS84").inv(ca.x, ca.y, cb.x, cb.y)[2])


def _explains(action: str, defect: str | None) -> bool:
    if action in ("repair", "replace"):
        return True
    if action == "clean":
        return defect == "soiling"
    return False


def compare(before: tuple[pd.DataFrame, pd.DataFrame], after: tuple[pd.DataFrame, pd.DataFrame],
            *, start_before: datetime, start_after: datetime,
            events: pd.DataFrame | None = None, settings: Mapping | None = None) -> pd.DataFrame:
    """Module-by-module change between two flights.

    Parameters
    ----------
    before, after : (modules, anomalies)
        DataFrames of each flight as in :class:`FlightResult`.
    start_before, start_after : datetime
        Start of each flight (aware); maintenance events between them explain resolved defects.
    events : pandas.DataFrame, optional
        Maintenance events (date, module_id, action, note).
    settings : mapping, optional
        The ``[history]`` section.

    Returns
    -------
    pandas.DataFrame
        One row per module with an anomaly in either flight that was imaged in both: module_id,
        table_id, change, defect_before, defect_after, severity_before, severity_after,
        delta_t_norm_k_before [K], delta_t_norm_k_after [K], repaired, suspicious, maintenance
        (actions between the flights), moved_m (centroid distance of the module's footprints in
        the two flights [m]; large values mean a changed layout, not the same place), geometry
        (lon/lat, the later flight's footprint). Modules with an anomaly that were
        not imaged (or barely) in the other flight are in ``.attrs["not_compared"]``.
    """
    cfg = _settings(settings)
    rank = dict(cfg["pattern_rank"])
    min_valid = float(cfg["min_valid_fraction"])
    mb, ab = before
    ma, aa = after
    sb, sa = module_states(mb, ab, rank), module_states(ma, aa, rank)
    def lookup(df: pd.DataFrame) -> dict:
        return {m: (vf, dt, tid, g) for m, vf, dt, tid, g in zip(
            df["module_id"], df["valid_fraction"], df["delta_t_norm_k"], df["table_id"], df["geometry"])}

    ib, ia = lookup(mb), lookup(ma)
    stb, sta = sb.to_dict("index"), sa.to_dict("index")

    def imaged(idx: dict, m: str) -> bool:
        if m not in idx:
            return False
        vf = idx[m][0]
        return bool(math.isnan(vf) or vf >= min_valid)

    acts: dict[str, list[str]] = {}
    if events is not None and len(events):
        for rec in events.to_dict("records"):
            if _event_between(rec["date"], start_before, start_after):
                acts.setdefault(rec["module_id"], []).append(rec["action"])

    rows, skipped = [], []
    for m in sorted(set(stb) | set(sta)):
        b, a_ = stb.get(m), sta.get(m)
        if not (imaged(ib, m) and imaged(ia, m)):
            skipped.append({"module_id": m, "in_before": m in ib, "in_after": m in ia,
                            "defect_before": b["defect"] if b else None,
                            "defect_after": a_["defect"] if a_ else None})
            continue
        db_ = b["defect"] if b else None
        da_ = a_["defect"] if a_ else None
        tb = b["delta_t_norm_k"] if b else float(ib[m][1])
        ta = a_["delta_t_norm_k"] if a_ else float(ia[m][1])
        change = classify_change(db_, float(tb), da_, float(ta), pattern_rank=rank,
                                 margin_k=float(cfg["change_margin_k"]),
                                 margin_rel=float(cfg["change_margin_rel"]))
        acts_m = acts.get(m, [])
        repaired = change == "resolved" and any(_explains(x, db_) for x in acts_m)
        geom = ia[m][3] if ia[m][3] is not None else ib[m][3]
        table = ia[m][2] if ia[m][2] is not None else ib[m][2]
        rows.append({"module_id": m, "table_id": table, "change": change,
                     "defect_before": db_, "defect_after": da_,
                     "severity_before": _text(b["severity"]) if b else None,
                     "severity_after": _text(a_["severity"]) if a_ else None,
                     "delta_t_norm_k_before": _num(tb), "delta_t_norm_k_after": _num(ta),
                     "repaired": bool(repaired), "suspicious": bool(change == "resolved" and not repaired),
                     "maintenance": ",".join(acts_m) if acts_m else None,
                     "moved_m": _moved_m(ib[m][3], ia[m][3]), "geometry": geom})
    out = pd.DataFrame(rows, columns=["module_id", "table_id", "change", "defect_before",
                                      "defect_after", "severity_before", "severity_after",
                                      "delta_t_norm_k_before", "delta_t_norm_k_after", "repaired",
                                      "suspicious", "maintenance", "moved_m", "geometry"])
    out.attrs["not_compared"] = skipped
    return out


def _rfc7946(geom) -> dict:
    """GeoJSON geometry with exterior rings counter-clockwise and holes clockwise (RFC 7946
    section 3.1.6)."""
    if geom.geom_type == "Polygon":
        geom = orient(geom, 1.0)
    elif geom.geom_type == "MultiPolygon":
        geom = shapely.MultiPolygon([orient(p, 1.0) for p in geom.geoms])
    return json.loads(shapely.to_geojson(geom))


def _pick_flights(con, path: Path, flight_from: str | None, flight_to: str | None):
    order = _flight_order(con)
    ids = [f for f, _ in order]
    starts = dict(order)
    if flight_from is None and flight_to is None:
        if len(ids) < 2:
            raise HistoryError(f"{path}: {len(ids)} flight(s) stored; changes need two")
        return ids[-2], ids[-1], starts
    if flight_from is None or flight_to is None:
        raise HistoryError(f"{path}: give both --from and --to, or neither")
    for f in (flight_from, flight_to):
        if f not in starts:
            raise HistoryError(f"{path}: no flight {f!r} (stored: {', '.join(ids) or 'none'})")
    if flight_from == flight_to:
        raise HistoryError(f"{path}: --from and --to are the same flight {flight_from!r}")
    return flight_from, flight_to, starts


def compare_flights(db_path: str | Path, flight_from: str | None = None, flight_to: str | None = None,
                    *, settings: Mapping | None = None) -> dict:
    """Changes between two stored flights as an RFC 7946 FeatureCollection (a dict).

    Parameters
    ----------
    db_path : path-like
    flight_from, flight_to : str, optional
        Flight ids; both or neither. Without them the two latest flights by start time.
    settings : mapping, optional
        The ``[history]`` section.

    Returns
    -------
    dict
        FeatureCollection: one feature per module with an anomaly in either flight, geometry
        the module footprint [lon/lat], properties as in ``schemas/changes.schema.json``.
        Foreign members: ``flight_before``, ``flight_after``, ``counts`` (per change class),
        ``not_compared`` (modules with an anomaly not imaged in the other flight).
    """
    path = Path(db_path)
    with _Session(path, write=False) as s:
        f_from, f_to, starts = _pick_flights(s.con, path, flight_from, flight_to)
        before, after = _read_flight(s.con, f_from), _read_flight(s.con, f_to)
        erows = s.con.execute("SELECT date, module_id, action, note FROM maintenance_events").fetchall()
    events = pd.DataFrame(erows, columns=["date", "module_id", "action", "note"])
    t_from, t_to = (datetime.fromisoformat(starts[f]) for f in (f_from, f_to))
    if t_to < t_from:
        log.info("%s: --from %s is later than --to %s", path, f_from, f_to)
    lo, hi = (t_from, t_to) if t_from <= t_to else (t_to, t_from)
    df = compare(before, after, start_before=lo, start_after=hi, events=events, settings=settings)
    features = []
    for rec in df.to_dict("records"):
        g = rec.pop("geometry")
        props = {k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in rec.items()}
        for k in ("delta_t_norm_k_before", "delta_t_norm_k_after", "moved_m"):
            if props[k] is not None:
                props[k] = round(float(props[k]), 3)
        features.append({"type": "Feature", "id": rec["module_id"],
                         "geometry": None if g is None else _rfc7946(g),
                         "properties": props})
    counts = {c: int((df["change"] == c).sum()) for c in CHANGE_CLASSES}
    counts["repaired"] = int(df["repaired"].sum())
    counts["suspicious"] = int(df["suspicious"].sum())
    from pvscan.io.outputs import safety_cautions

    return {"type": "FeatureCollection", "name": "changes",
            "flight_before": {"flight_id": f_from, "start": starts[f_from]},
            "flight_after": {"flight_id": f_to, "start": starts[f_to]},
            "counts": counts, "not_compared": df.attrs["not_compared"],
            "note": ("A defect resolved without a recorded repair (suspicious) may be a missed "
                     "detection or an intermittent fault: confirm it on site before closing it."),
            "safety": safety_cautions(), "features": features}


def write_changes(changes: Mapping, out_path: str | Path, *, overwrite: bool = False) -> Path:
    """Write the FeatureCollection of :func:`compare_flights` as GeoJSON, atomically.

    Parameters
    ----------
    overwrite : bool
        Replace an existing file.

    Raises
    ------
    OutputError
        When the file exists and ``overwrite`` is false, or it cannot be written.
    """
    from pvscan.errors import OutputError
    from pvscan.io.outputs import atomic_write

    p = Path(out_path)
    if p.is_dir():
        raise OutputError(f"{p}: is a folder, not a file")
    if p.exists() and not overwrite:
        raise OutputError(f"{p}: exists (use --overwrite to replace it)")
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{p.parent}: cannot create the folder: {exc.strerror or exc}") from None
    return atomic_write(p, json.dumps(changes, indent=1, allow_nan=False) + "\n")


# --------------------------------------------------------------------------------------------
# trend


def normalised_rise(temp_module, temp_air, poa_global, wind_speed, u0: float = 25.0,
                    u1: float = 6.84):
    """Module temperature rise over air scaled to 1000 W/m2 and 1 m/s wind (Faiman model).

    In the Faiman model [2] the steady rise is ``T_m - T_a = G / (u0 + u1 * v)``; scaling the
    measured rise by ``(1000 / G) * (U(v) / U(1))`` makes flights of different irradiance,
    wind and season comparable: a module that follows the model gives ``1000 / (u0 + u1)``
    in every flight.

    Parameters
    ----------
    temp_module : array-like
        Module temperature. [degC]
    temp_air : array-like
        Air temperature. [degC]
    poa_global : array-like
        Plane-of-array irradiance. [W/m2]
    wind_speed : array-like
        Wind speed. [m/s]
    u0 : float
        Constant heat-loss coefficient. [W/(m2 K)]
    u1 : float
        Wind heat-loss coefficient. [W s/(m3 K)]

    Returns
    -------
    numpy.ndarray or float
        Normalised rise. [K] NaN where the irradiance is not positive.

    References
    ----------
    .. [2] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
       Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    tm, ta, g, v = (np.asarray(x, dtype=float) for x in (temp_module, temp_air, poa_global, wind_speed))
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(g > 0, (tm - ta) * (1000.0 / g) * ((u0 + u1 * v) / (u0 + u1 * 1.0)), np.nan)
    return out if out.ndim else float(out)


@dataclass(frozen=True)
class Trend:
    """Per-flight and per-module series of a site.

    Attributes
    ----------
    flights : pandas.DataFrame
        One row per flight (oldest first): flight_id, start, n_modules, n_anomalies,
        ``count_<defect>`` and ``severity_<severity>`` columns, total_power_loss_w [W],
        total_energy_loss_kwh_per_year [kWh/yr], median_t_module_c [degC],
        median_delta_t_norm_k [K], median_rise_norm_k [K] (Faiman-normalised rise over air;
        NaN when the flight's conditions are not stored).
    modules : pandas.DataFrame
        Long format, one row per module and flight: flight_id, start, module_id, table_id,
        t_median_c [degC], delta_t_norm_k [K], defect, severity, power_loss_w [W].
    """

    flights: pd.DataFrame
    modules: pd.DataFrame = field(repr=False)


def _cond(conds: Mapping, *keys) -> float:
    for k in keys:
        v = conds.get(k)
        if isinstance(v, Mapping):
            v = v.get("value", v.get("mean"))
        v = _num(v) if not isinstance(v, Mapping) else math.nan
        if not math.isnan(v):
            return v
    return math.nan


def site_trend(db_path: str | Path, *, settings: Mapping | None = None) -> Trend:
    """Counts per defect and severity, losses and temperatures of every stored flight.

    Parameters
    ----------
    db_path : path-like
    settings : mapping, optional
        The ``[history]`` section (Faiman coefficients for the normalised rise).

    Returns
    -------
    Trend
    """
    cfg = _settings(settings)
    with _Session(db_path, write=False) as s:
        flights = s.con.execute(
            "SELECT flight_id, start, n_modules, n_anomalies, total_power_loss_w, "
            "total_energy_loss_kwh_per_year, conditions_json FROM flights "
            "ORDER BY start_utc, flight_id").fetchall()
        anoms = s.con.execute("SELECT flight_id, defect, severity FROM anomalies").fetchall()
        mods = s.con.execute(
            "SELECT flight_id, module_id, table_id, t_median_c, delta_t_norm_k, defect, severity, "
            "power_loss_w FROM module_results ORDER BY module_id").fetchall()
    fl = pd.DataFrame(flights, columns=["flight_id", "start", "n_modules", "n_anomalies",
                                        "total_power_loss_w", "total_energy_loss_kwh_per_year",
                                        "conditions_json"])
    an = pd.DataFrame(anoms, columns=["flight_id", "defect", "severity"])
    md = pd.DataFrame(mods, columns=["flight_id", "module_id", "table_id", "t_median_c",
                                     "delta_t_norm_k", "defect", "severity", "power_loss_w"])
    for c in ("t_median_c", "delta_t_norm_k", "power_loss_w"):
        md[c] = pd.to_numeric(md[c]).astype(float)
    order = {f: i for i, f in enumerate(fl["flight_id"])}
    defects = sorted(set(an["defect"].dropna()))
    severities = [x for x in SEVERITY_RANK if x in set(an["severity"].dropna())]
    rows = []
    for rec in fl.to_dict("records"):
        f = rec["flight_id"]
        a = an[an["flight_id"] == f]
        m = md[md["flight_id"] == f]
        row = {k: rec[k] for k in ("flight_id", "start", "n_modules", "n_anomalies")}
        for d in defects:
            row[f"count_{d}"] = int((a["defect"] == d).sum())
        for sv in severities:
            row[f"severity_{sv}"] = int((a["severity"] == sv).sum())
        row["total_power_loss_w"] = _num(rec["total_power_loss_w"])
        row["total_energy_loss_kwh_per_year"] = _num(rec["total_energy_loss_kwh_per_year"])
        tm = m["t_median_c"].to_numpy()
        row["median_t_module_c"] = float(np.nanmedian(tm)) if np.isfinite(tm).any() else math.nan
        dn = m["delta_t_norm_k"].to_numpy()
        row["median_delta_t_norm_k"] = float(np.nanmedian(dn)) if np.isfinite(dn).any() else math.nan
        conds = json.loads(rec["conditions_json"] or "{}")
        g = _cond(conds, "poa_irradiance_w_m2", "poa_global", "poa_global_w_m2")
        ta = _cond(conds, "ambient_c", "temp_air", "temp_air_c")
        v = _cond(conds, "wind_m_s", "wind_speed", "wind_speed_m_s")
        if np.isfinite(tm).any() and not any(math.isnan(x) for x in (g, ta, v)):
            row["median_rise_norm_k"] = float(np.nanmedian(normalised_rise(
                tm, ta, g, v, float(cfg["faiman_u0"]), float(cfg["faiman_u1"]))))
        else:
            row["median_rise_norm_k"] = math.nan
        rows.append(row)
    per_flight = pd.DataFrame(rows)
    starts = dict(zip(fl["flight_id"], fl["start"]))
    md.insert(1, "start", md["flight_id"].map(starts))
    md["_o"] = md["flight_id"].map(order)
    md = md.sort_values(["module_id", "_o"], kind="stable").drop(columns="_o").reset_index(drop=True)
    return Trend(per_flight, md)


_SEVERITY_COLOURS = {"safety": "#b2182b", "repair": "#ef8a62", "monitor": "#67a9cf"}
_MARKERS = "osD^vP*Xhp<>"


def _plot_trend(trend: Trend, out_dir: Path) -> list[str]:
    # a bare Figure renders with the Agg canvas: no pyplot, no global backend state
    from matplotlib.figure import Figure
    from matplotlib.ticker import MaxNLocator

    fl = trend.flights
    # naive UTC datetimes: matplotlib dates, no time-zone conversions
    x = pd.DatetimeIndex([datetime.fromisoformat(s).astimezone(timezone.utc).replace(tzinfo=None)
                          for s in fl["start"]])
    labels = list(fl["flight_id"])
    written = []

    fig = Figure(figsize=(8, 7), layout="constrained")
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    cols = [c for c in fl.columns if c.startswith("count_")]
    for k, c in enumerate(cols):
        ax.plot(x, fl[c], marker=_MARKERS[k % len(_MARKERS)], linestyle="-" if k < 10 else "--",
                label=c[len("count_"):])
    ax.plot(x, fl["n_anomalies"], marker="s", color="black", linewidth=2, label="all anomalies")
    ax.set_ylabel("anomalies per flight [-]")
    ax.set_title("Anomalies per defect pattern")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize="small", ncols=2)
    bottom = np.zeros(len(fl))
    width = _bar_width(x)
    for sv in ("safety", "repair", "monitor"):
        c = f"severity_{sv}"
        if c in fl.columns:
            vals = fl[c].to_numpy(dtype=float)
            ax2.bar(x, vals, width=width, bottom=bottom, color=_SEVERITY_COLOURS[sv], label=sv)
            bottom += vals
    ax2.set_ylabel("anomalies per flight [-]")
    ax2.set_title("Anomalies per severity")
    ax2.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax2.grid(True, axis="y", alpha=0.3)
    ax2.legend(fontsize="small")
    ax2.set_xlabel("flight start (UTC)")
    _label_flights(ax2, x, labels)
    fig.savefig(out_dir / "counts.png", dpi=100)
    written.append("counts.png")

    fig = Figure(figsize=(8, 6), layout="constrained")
    ax, ax2 = fig.subplots(2, 1, sharex=True)
    ax.plot(x, fl["total_power_loss_w"] / 1000.0, marker="o", color="tab:red")
    ax.set_ylabel("power loss at STC [kW]")
    ax.set_title("Estimated losses")
    ax.set_ylim(bottom=0)
    ax.grid(True, alpha=0.3)
    ax2.plot(x, fl["total_energy_loss_kwh_per_year"] / 1000.0, marker="s", color="tab:blue")
    ax2.set_ylabel("energy loss [MWh/yr]")
    ax2.set_ylim(bottom=0)
    ax2.grid(True, alpha=0.3)
    ax2.set_xlabel("flight start (UTC)")
    _label_flights(ax2, x, labels)
    fig.savefig(out_dir / "loss.png", dpi=100)
    written.append("loss.png")
    return written


def _bar_width(x) -> float:
    """Bar width [days] for bars at dates ``x``: a third of the smallest spacing."""
    if len(x) < 2:
        return 10.0
    gaps = np.diff(np.sort(x.to_numpy()).astype("datetime64[s]").astype(float)) / 86400.0
    gaps = gaps[gaps > 0]
    return float(max(gaps.min() / 3.0, 0.5)) if gaps.size else 10.0


def _label_flights(ax, x, labels) -> None:
    from matplotlib.dates import AutoDateLocator, ConciseDateFormatter

    locator = AutoDateLocator(maxticks=7)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))
    for xi, lab in zip(x, labels):
        ax.annotate(str(lab), (xi, 0), xytext=(0, -34), textcoords="offset points",
                    ha="center", va="top", fontsize="x-small", rotation=0,
                    annotation_clip=False)


def write_trend(trend: Trend, out_dir: str | Path, *, overwrite: bool = False) -> list[Path]:
    """Write ``flights.csv``, ``modules.csv`` (long format), ``counts.png`` and ``loss.png``.

    Everything is written into a staging folder beside ``out_dir`` and renamed into place
    only when all files are complete.

    Raises
    ------
    OutputError
        ``out_dir`` exists, is not empty and ``overwrite`` is false; or it cannot be written.
    """
    from pvscan.io.outputs import atomic_write, staging_dir

    out = Path(out_dir)
    with staging_dir(out, overwrite=overwrite) as stage:
        atomic_write(stage / "flights.csv", trend.flights.to_csv(index=False, lineterminator="\n"))
        atomic_write(stage / "modules.csv", trend.modules.to_csv(index=False, lineterminator="\n"))
        names = ["flights.csv", "modules.csv"]
        if len(trend.flights):
            names += _plot_trend(trend, stage)
    return [out / n for n in names]
