"""Degradation of the modules that were ever anomalous: normalised delta T flight by flight
and its robust rate of change per year.

A hot spot that grows by a few kelvin a year will fail; one that stays put can wait. For
every module that had a defect in any stored flight, :func:`module_degradation` gives its
``delta_t_norm_k`` (normalised to reference irradiance and wind, so seasons compare) in
every flight that imaged it, and the Theil-Sen slope through them [K/yr] with its
confidence interval (:func:`scipy.stats.theilslopes`): the median of the pairwise slopes,
which one odd flight (a reflection, a cloud) cannot pull away [1, 2].

The history keeps the result as the spatial layer ``module_degradation`` (refreshed by every
``history add``; module footprint, lon/lat) and ``pvscan history degradation`` writes it as
a CSV with one column per flight.

References
----------
.. [1] H. Theil, "A rank-invariant method of linear and polynomial regression analysis",
   Proc. Koninklijke Nederlandse Akademie van Wetenschappen 53, 1950.
.. [2] P. K. Sen, "Estimates of the regression coefficient based on Kendall's tau",
   Journal of the American Statistical Association 63(324), 1379-1389, 1968.
   doi:10.1080/01621459.1968.10480934
"""
from __future__ import annotations

import json
import math
import sqlite3
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd

from pvscan.history.common import _settings, write_new_file
from pvscan.history.db import _gpkg_blobs, _gpkg_geoms, _now, _Session

__all__ = ["Degradation", "module_degradation", "write_degradation_csv", "DEGRADATION_COLUMNS"]

_DAYS_PER_YEAR = 365.25  # Julian year [d]

#: Per-module columns of the layer and the CSV (the CSV adds one ``dtn_<flight_id>`` column per flight).
DEGRADATION_COLUMNS = ("module_id", "table_id", "n_flights", "n_flights_anomalous", "defects",
                       "first_flight", "last_flight", "delta_t_norm_k_first", "delta_t_norm_k_last",
                       "slope_k_per_year", "slope_low_k_per_year", "slope_high_k_per_year")

_LAYER_SQL = """CREATE TABLE IF NOT EXISTS module_degradation (
    fid INTEGER PRIMARY KEY AUTOINCREMENT, geom POLYGON, module_id TEXT NOT NULL UNIQUE,
    table_id TEXT, n_flights INTEGER, n_flights_anomalous INTEGER, defects TEXT,
    first_flight TEXT, last_flight TEXT, delta_t_norm_k_first REAL, delta_t_norm_k_last REAL,
    slope_k_per_year REAL, slope_low_k_per_year REAL, slope_high_k_per_year REAL,
    series_json TEXT)"""


@dataclass(frozen=True)
class Degradation:
    """Normalised delta T of the ever-anomalous modules, flight by flight, and their slopes.

    Attributes
    ----------
    modules : pandas.DataFrame
        One row per module: :data:`DEGRADATION_COLUMNS` (``slope_*`` in [K/yr], NaN with fewer
        than ``[history] degradation_min_flights`` flights), ``geometry`` (lon/lat).
    series : pandas.DataFrame
        Long format, one row per module and flight that imaged it: module_id, flight_id,
        start, years (since the module's first flight) [yr], delta_t_norm_k [K] (the largest of
        the module's anomalies in that flight, a hot spot's own region; the module's own value
        when nothing was found there), source (``anomaly`` or ``module``), defect.
    flights : list of str
        Flight ids, oldest first.
    """

    modules: pd.DataFrame
    series: pd.DataFrame = field(repr=False)
    flights: list = field(default_factory=list)


def _theil_sen(years: np.ndarray, values: np.ndarray, confidence: float) -> tuple[float, float, float]:
    """Theil-Sen slope and its confidence interval [K/yr]; NaN when the times do not vary."""
    from scipy.stats import theilslopes

    if len(years) < 2 or np.ptp(years) <= 0:
        return math.nan, math.nan, math.nan
    res = theilslopes(values, years, alpha=confidence)
    return float(res[0]), float(res[2]), float(res[3])


def _compute(con: sqlite3.Connection, cfg: Mapping) -> Degradation:
    flights = con.execute("SELECT flight_id, start, start_utc FROM flights ORDER BY start_utc, flight_id").fetchall()
    ids = [f for f, _, _ in flights]
    rows = con.execute(
        "SELECT r.module_id, r.table_id, r.flight_id, r.delta_t_norm_k, r.defect, r.valid_fraction "
        "FROM module_results r WHERE r.module_id IN "
        "(SELECT DISTINCT module_id FROM module_results WHERE defect IS NOT NULL)").fetchall()
    site = {m: (t, g) for m, t, g in con.execute("SELECT module_id, table_id, geom FROM site_modules")}
    series = pd.DataFrame(rows, columns=["module_id", "table_id", "flight_id", "delta_t_norm_k", "defect",
                                         "valid_fraction"])
    # a module's value in a flight: the largest delta T of its anomalies there (a hot spot's
    # own region), else the module's (its median against the reference)
    found: dict[tuple[str, str], float] = {}
    for fid, mids, dtn in con.execute("SELECT flight_id, module_ids, delta_t_norm_k FROM anomalies"):
        if dtn is None:
            continue
        for m in json.loads(mids):
            key = (fid, m)
            found[key] = max(found.get(key, -math.inf), float(dtn))
    extra = sorted({m for _, m in found} - set(series["module_id"]))
    if extra:  # named by an anomaly only (a module table without the defect column)
        marks = ", ".join("?" * len(extra))
        more = con.execute("SELECT module_id, table_id, flight_id, delta_t_norm_k, defect, valid_fraction "
                           f"FROM module_results WHERE module_id IN ({marks})", extra).fetchall()
        # one frame from both row lists (concatenating onto an empty frame changes dtypes
        # between pandas versions)
        series = pd.DataFrame(list(rows) + list(more), columns=series.columns)
    series["delta_t_norm_k"] = pd.to_numeric(series["delta_t_norm_k"]).astype(float)
    own = [found.get((f, m)) for f, m in zip(series["flight_id"], series["module_id"])]
    series["source"] = ["anomaly" if v is not None else "module" for v in own]
    series["delta_t_norm_k"] = [v if v is not None else d for v, d in zip(own, series["delta_t_norm_k"])]
    order = {f: k for k, f in enumerate(ids)}
    utc = {f: datetime.fromisoformat(u.replace("Z", "+00:00")) for f, _, u in flights}
    starts = {f: s for f, s, _ in flights}
    series["delta_t_norm_k"] = pd.to_numeric(series["delta_t_norm_k"]).astype(float)
    vf = pd.to_numeric(series["valid_fraction"]).astype(float)
    series.loc[vf < float(cfg["min_valid_fraction"]), "delta_t_norm_k"] = np.nan  # barely imaged
    series["start"] = series["flight_id"].map(starts)
    series["_o"] = series["flight_id"].map(order)
    series = series.sort_values(["module_id", "_o"], kind="stable").drop(columns=["_o", "valid_fraction"])
    t_days = np.array([(utc[f] - utc[ids[0]]).total_seconds() / 86400.0 for f in series["flight_id"]]) \
        if len(series) else np.zeros(0)
    series["years"] = t_days / _DAYS_PER_YEAR
    first_year = series.groupby("module_id")["years"].transform("min") if len(series) else series["years"]
    series["years"] = (series["years"] - first_year).round(6)
    min_flights = int(cfg["degradation_min_flights"])
    confidence = float(cfg["degradation_confidence"])
    out = []
    for mid, grp in series.groupby("module_id", sort=True):
        ok = np.isfinite(grp["delta_t_norm_k"].to_numpy())
        g = grp[ok]
        yrs, vals = g["years"].to_numpy(), g["delta_t_norm_k"].to_numpy()
        slope = _theil_sen(yrs, vals, confidence) if len(g) >= min_flights else (math.nan,) * 3
        table = site.get(mid, (None, None))[0]
        if table is None:
            table = grp["table_id"].dropna().iloc[-1] if grp["table_id"].notna().any() else None
        out.append({
            "module_id": mid, "table_id": table, "n_flights": int(len(g)),
            "n_flights_anomalous": int(grp["defect"].notna().sum()),
            "defects": ",".join(sorted(set(grp["defect"].dropna()))),
            "first_flight": g["flight_id"].iloc[0] if len(g) else None,
            "last_flight": g["flight_id"].iloc[-1] if len(g) else None,
            "delta_t_norm_k_first": float(vals[0]) if len(g) else math.nan,
            "delta_t_norm_k_last": float(vals[-1]) if len(g) else math.nan,
            "slope_k_per_year": slope[0], "slope_low_k_per_year": slope[1], "slope_high_k_per_year": slope[2],
        })
    modules = pd.DataFrame(out, columns=list(DEGRADATION_COLUMNS))
    blobs = [site.get(m, (None, None))[1] for m in modules["module_id"]]
    modules["geometry"] = _gpkg_geoms(blobs)
    return Degradation(modules, series.reset_index(drop=True), ids)


def module_degradation(db_path: str | Path, *, settings: Mapping | None = None) -> Degradation:
    """Normalised delta T flight by flight and the Theil-Sen slope per year of every module
    that was ever anomalous.

    Parameters
    ----------
    db_path : path-like
        The site history.
    settings : mapping, optional
        The pipeline or its ``[history]`` section: ``min_valid_fraction`` (flights that
        barely imaged a module are left out), ``degradation_min_flights`` (fewest flights
        for a slope), ``degradation_confidence`` (level of the slope's interval).

    Returns
    -------
    Degradation
    """
    cfg = _settings(settings)
    with _Session(db_path, write=False) as s:
        return _compute(s.con, cfg)


def refresh_layer(con: sqlite3.Connection, cfg: Mapping) -> None:
    """Rewrite the ``module_degradation`` layer from the flights stored (inside the caller's
    write transaction; the table is created and registered when missing)."""
    deg = _compute(con, cfg)
    con.execute(_LAYER_SQL)
    now = _now()
    con.execute("INSERT OR IGNORE INTO gpkg_contents (table_name, data_type, identifier, description, "
                "last_change, srs_id) VALUES ('module_degradation', 'features', 'module_degradation', "
                "'normalised delta T per flight and Theil-Sen slope of every module ever anomalous', ?, 4326)",
                (now,))
    con.execute("INSERT OR IGNORE INTO gpkg_geometry_columns VALUES ('module_degradation', 'geom', 'POLYGON', "
                "4326, 0, 0)")
    con.execute("DELETE FROM module_degradation")
    per = {m: [[f, None if not np.isfinite(v) else round(float(v), 4)]
               for f, v in zip(g["flight_id"], g["delta_t_norm_k"])]
           for m, g in deg.series.groupby("module_id", sort=False)}
    recs = []
    for r, blob in zip(deg.modules.to_dict("records"), _gpkg_blobs(deg.modules["geometry"])):
        vals = [None if isinstance(r[c], float) and math.isnan(r[c]) else r[c] for c in DEGRADATION_COLUMNS]
        recs.append((blob, *vals, json.dumps(per.get(r["module_id"], []))))
    con.executemany(
        f"INSERT INTO module_degradation (geom, {', '.join(DEGRADATION_COLUMNS)}, series_json) "
        f"VALUES ({', '.join('?' * (len(DEGRADATION_COLUMNS) + 2))})", recs)
    geoms = [g for g in deg.modules["geometry"] if g is not None]
    if geoms:
        import shapely

        minx, miny, maxx, maxy = (float(v) for v in shapely.total_bounds(np.array(geoms, dtype=object)))
        con.execute("UPDATE gpkg_contents SET min_x=?, min_y=?, max_x=?, max_y=?, last_change=? "
                    "WHERE table_name='module_degradation'", (minx, miny, maxx, maxy, now))


def degradation_table(deg: Degradation) -> pd.DataFrame:
    """One row per module: :data:`DEGRADATION_COLUMNS` then ``dtn_<flight_id>`` [K] per flight."""
    table = deg.modules[list(DEGRADATION_COLUMNS)].copy()
    if len(deg.series):
        wide = deg.series.pivot_table(index="module_id", columns="flight_id", values="delta_t_norm_k",
                                      aggfunc="first", dropna=False)
        for f in deg.flights:
            col = wide[f] if f in wide.columns else pd.Series(dtype=float)
            table[f"dtn_{f}"] = table["module_id"].map(col).astype(float).round(4)
    for c in ("delta_t_norm_k_first", "delta_t_norm_k_last", "slope_k_per_year", "slope_low_k_per_year",
              "slope_high_k_per_year"):
        table[c] = table[c].astype(float).round(4)
    return table


def write_degradation_csv(deg: Degradation, out_path: str | Path, *, overwrite: bool = False) -> Path:
    """Write :func:`degradation_table` as CSV, atomically (``overwrite`` to replace a file).

    Raises
    ------
    OutputError
        When the file exists and ``overwrite`` is false, or it cannot be written.
    """
    text = degradation_table(deg).to_csv(index=False, lineterminator="\n")
    return write_new_file(out_path, text, overwrite=overwrite)
