"""What changed between two flights of a site, module by module."""
from __future__ import annotations

import json
import logging
import math
import sqlite3
from collections.abc import Mapping
from datetime import date, datetime
from pathlib import Path
from typing import Any

import pandas as pd
import shapely
from shapely.geometry.polygon import orient

from pvscan.errors import HistoryError
from pvscan.history.common import CHANGE_CLASSES, SEVERITY_RANK, _settings, _text, write_new_file
from pvscan.history.db import _Session
from pvscan.history.store import _flight_order, _read_flight
from pvscan.io.records import as_float as _num

log = logging.getLogger(__name__)

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

    def key(x: tuple[str, str | None, float | None]) -> tuple[int, int, float]:
        dt = x[2] if x[2] is not None and not (isinstance(x[2], float) and math.isnan(x[2])) else -math.inf
        return (pattern_rank.get(x[0], 0), SEVERITY_RANK.get(x[1] or "", 0), dt)

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
def _moved_m(a: Any, b: Any) -> float:
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
        (actions between the flights), maintenance_events (their date, action and note),
        moved_m (centroid distance of the module's footprints in
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

    acts: dict[str, list[dict]] = {}
    if events is not None and len(events):
        for rec in events.sort_values("date", kind="stable").to_dict("records"):
            if _event_between(rec["date"], start_before, start_after):
                acts.setdefault(rec["module_id"], []).append(
                    {"date": rec["date"], "action": rec["action"], "note": _text(rec.get("note")) or ""})

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
        explaining = [e for e in acts_m if _explains(e["action"], db_)]
        repaired = change == "resolved" and bool(explaining)
        if db_ is not None and da_ is not None and explaining:
            change = "persists_after_repair"  # repaired or replaced, and still there: a failed repair
        geom = ia[m][3] if ia[m][3] is not None else ib[m][3]
        table = ia[m][2] if ia[m][2] is not None else ib[m][2]
        rows.append({"module_id": m, "table_id": table, "change": change,
                     "defect_before": db_, "defect_after": da_,
                     "severity_before": _text(b["severity"]) if b else None,
                     "severity_after": _text(a_["severity"]) if a_ else None,
                     "delta_t_norm_k_before": _num(tb), "delta_t_norm_k_after": _num(ta),
                     "repaired": bool(repaired), "suspicious": bool(change == "resolved" and not repaired),
                     "maintenance": ",".join(e["action"] for e in acts_m) if acts_m else None,
                     "maintenance_events": acts_m,
                     "moved_m": _moved_m(ib[m][3], ia[m][3]), "geometry": geom})
    out = pd.DataFrame(rows, columns=["module_id", "table_id", "change", "defect_before",
                                      "defect_after", "severity_before", "severity_after",
                                      "delta_t_norm_k_before", "delta_t_norm_k_after", "repaired",
                                      "suspicious", "maintenance", "maintenance_events", "moved_m",
                                      "geometry"])
    out.attrs["not_compared"] = skipped
    return out


def _rfc7946(geom: Any) -> dict[str, Any]:
    """GeoJSON geometry with exterior rings counter-clockwise and holes clockwise (RFC 7946
    section 3.1.6)."""
    if geom.geom_type == "Polygon":
        geom = orient(geom, 1.0)
    elif geom.geom_type == "MultiPolygon":
        geom = shapely.MultiPolygon([orient(p, 1.0) for p in geom.geoms])
    return json.loads(shapely.to_geojson(geom))


def _pick_flights(con: sqlite3.Connection, path: Path, flight_from: str | None, flight_to: str | None
                  ) -> tuple[str, str, dict[str, str]]:
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
    first = df["change"] == "persists_after_repair"  # the most important news: listed first
    df = pd.concat([df[first], df[~first]]) if len(df) else df
    for rec in df.to_dict("records"):
        g = rec.pop("geometry")
        props = {k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in rec.items()}
        for k in ("delta_t_norm_k_before", "delta_t_norm_k_after", "moved_m"):
            val = props[k]
            if val is not None:
                props[k] = round(float(val), 3)
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
            "note": ("A defect still present after a recorded repair or replacement "
                     "(persists_after_repair) is a failed repair: check the work done. A defect "
                     "resolved without a recorded repair (suspicious) may be a missed detection or "
                     "an intermittent fault: confirm it on site before closing it."),
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
    return write_new_file(out_path, json.dumps(changes, indent=1, allow_nan=False) + "\n", overwrite=overwrite)
