"""The site database: GeoPackage 1.3.1 encoding written with sqlite3, and one transaction per command.

References
----------
.. [1] Open Geospatial Consortium, "OGC GeoPackage Encoding Standard", version 1.3.1,
   OGC 12-128r18, 2021.
"""
from __future__ import annotations

import logging
import os
import sqlite3
import struct
import time
import uuid
from collections.abc import Iterable, Sequence
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np
import shapely

from pvscan import __version__
from pvscan.errors import HistoryError
from pvscan.history.common import (
    _BUSY_TIMEOUT_S,
    _LOCK_RETRIES,
    APPLICATION,
    GPKG_APPLICATION_ID,
    GPKG_USER_VERSION,
    SCHEMA_VERSION,
)

log = logging.getLogger(__name__)

# --------------------------------------------------------------------------------------------
# GeoPackage binary geometry [1], clause 2.1.3


def _gpkg_blobs(geoms: Iterable[Any], srs_id: int = 4326) -> list[bytes | None]:
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


def _gpkg_blob(geom: Any, srs_id: int = 4326) -> bytes | None:
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


def _gpkg_geoms(blobs: Sequence[bytes | None]) -> list[Any]:
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
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")[:-4] + "Z"


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
        version = int(raw)  # type: ignore[arg-type]  # None raises TypeError, caught below
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

    def __enter__(self) -> _Session:
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

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        rollback = exc_type is not None or self._discard or not self.write
        try:
            self._close(rollback)
        except sqlite3.Error as err:
            if exc_type is None:
                raise HistoryError(f"{self.path}: cannot commit: {err}") from None
        if exc_type is not None and issubclass(exc_type, sqlite3.Error):
            # rolled back: nothing of this command was written
            raise HistoryError(f"{self.path}: database error ({exc}); nothing written") from None
