"""Storing flights in the site history (idempotent adds, layout differences) and reading them back."""
from __future__ import annotations

import json
import logging
import math
import sqlite3
import warnings
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from datetime import UTC
from pathlib import Path
from typing import SupportsFloat

import numpy as np
import pandas as pd
import shapely

from pvscan.errors import HistoryError
from pvscan.history.common import LayoutChangeWarning, _as_objects, _pick, _settings
from pvscan.history.db import _create_database, _create_schema, _gpkg_blobs, _gpkg_geoms, _now, _Session
from pvscan.history.results import (
    ANOMALY_NUMERIC_COLUMNS,
    MODULE_NUMERIC_COLUMNS,
    FlightResult,
    content_hash,
    read_result_dir,
)

log = logging.getLogger(__name__)

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
        def ids(xs: Iterable[str]) -> str:
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


def _f(x: SupportsFloat | str | None) -> float | None:
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
            site_name: str | None = result.site
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
             result.start.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ"),
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
        from pvscan.history.degradation import refresh_layer

        refresh_layer(con, cfg)
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


def _flight_order(con: sqlite3.Connection) -> list[tuple[str, str]]:
    return con.execute("SELECT flight_id, start FROM flights ORDER BY start_utc, flight_id").fetchall()


def _read_flight(con: sqlite3.Connection, flight_id: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    mcols = ["module_id", "table_id", *MODULE_NUMERIC_COLUMNS, "defect", "severity"]
    rows = con.execute(f"SELECT geom, {', '.join(mcols)} FROM module_results WHERE flight_id=? "
                       "ORDER BY module_id", (flight_id,)).fetchall()
    modules = pd.DataFrame([r[1:] for r in rows], columns=mcols)
    modules["geometry"] = _gpkg_geoms([r[0] for r in rows])
    for c in MODULE_NUMERIC_COLUMNS:
        modules[c] = pd.to_numeric(modules[c]).astype(float)
    _as_objects(modules, ("module_id", "table_id", "defect", "severity"))
    acols = ["anomaly_id", "module_id", "module_ids", "defect", "severity", "priority", *ANOMALY_NUMERIC_COLUMNS]
    rows = con.execute(f"SELECT geom, {', '.join(acols)} FROM anomalies WHERE flight_id=? "
                       "ORDER BY fid", (flight_id,)).fetchall()
    anomalies = pd.DataFrame([r[1:] for r in rows], columns=acols)
    anomalies["module_ids"] = [json.loads(x) for x in anomalies["module_ids"]]
    anomalies["geometry"] = _gpkg_geoms([r[0] for r in rows])
    for c in ANOMALY_NUMERIC_COLUMNS:
        anomalies[c] = pd.to_numeric(anomalies[c]).astype(float)
    _as_objects(anomalies, ("anomaly_id", "module_id", "defect", "severity", "priority"))
    return modules, anomalies


def load_flight_results(db_path: str | Path, flight_id: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The stored modules and anomalies of one flight (columns as in :class:`FlightResult`)."""
    with _Session(db_path, write=False) as s:
        if s.con.execute("SELECT 1 FROM flights WHERE flight_id=?", (flight_id,)).fetchone() is None:
            raise HistoryError(f"{db_path}: no flight {flight_id!r}")
        return _read_flight(s.con, flight_id)
