"""Reading the result folder of one ``pvscan inspect`` run, and its content hash."""
from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import shapely

from pvscan.errors import HistoryError
from pvscan.history.common import (
    NOT_A_RESULT,
    _as_objects,
    _features,
    _geometries,
    _parse_time,
    _pick,
    _worse_severity,
)
from pvscan.io.records import as_float as _num
from pvscan.io.resources import read_json_file

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


#: Numeric properties of a result's modules the history keeps (read as floats, NaN when missing).
MODULE_NUMERIC_COLUMNS = ("t_mean_c", "t_median_c", "t_p95_c", "t_max_c", "t_min_c", "t_std_k",
                          "valid_fraction", "reference_c", "delta_t_k", "delta_t_norm_k", "power_loss_w")
#: Numeric properties of a result's anomalies the history keeps (read as floats, NaN when missing).
ANOMALY_NUMERIC_COLUMNS = ("delta_t_k", "delta_t_norm_k", "t_max_c", "power_loss_w",
                           "energy_loss_kwh_per_year", "confidence")


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
    summary = read_json_file(d / "summary.json", HistoryError, NOT_A_RESULT)
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
        for c in MODULE_NUMERIC_COLUMNS:
            row[c] = _num(props.get(c))
        row["geometry"] = feat.get("geometry")
        rows.append(row)
    modules = pd.DataFrame(rows, columns=["module_id", "table_id", "defect", "severity",
                                          *MODULE_NUMERIC_COLUMNS, "geometry"])
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
        for c in ANOMALY_NUMERIC_COLUMNS:
            row[c] = _num(props.get(c))
        row["geometry"] = feat.get("geometry")
        arows.append(row)
    anomalies = pd.DataFrame(arows, columns=["anomaly_id", "module_id", "module_ids", "defect",
                                             "severity", "priority", *ANOMALY_NUMERIC_COLUMNS, "geometry"])
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
             "start": result.start.astimezone(UTC).isoformat(),
             "end": result.end.astimezone(UTC).isoformat() if result.end else None}
    h.update(json.dumps(ident, sort_keys=True).encode())
    for name, df, key in (("modules", result.modules, "module_id"),
                          ("anomalies", result.anomalies, "anomaly_id")):
        h.update(name.encode())
        recs = _records(df.sort_values(key, kind="stable").reset_index(drop=True))
        h.update(json.dumps(recs, default=_json_default, allow_nan=False).encode())
    return h.hexdigest()


def _json_default(obj: object) -> int | float | str | None:
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return None if math.isnan(obj) else float(obj)
    return str(obj)
