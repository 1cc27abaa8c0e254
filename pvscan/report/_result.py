"""Read a result folder (modules.geojson, anomalies.geojson, workorders.csv, summary.json)
into one record the report and the CLI summary share.

The reader is tolerant of extra keys and of optional keys that are missing: a report of
an older or partial result folder is still better than none. Required files missing or
unreadable raise :class:`pvscan.errors.OutputError` naming the file.
"""
from __future__ import annotations

import logging
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pvscan.errors import OutputError
from pvscan.io.records import as_float as _num
from pvscan.io.records import get_path
from pvscan.io.resources import read_json_file

__all__ = ["ResultData", "load_result", "SEVERITIES", "get_path", "validity_checks"]

log = logging.getLogger(__name__)

#: Severity vocabulary in order of urgency (CONTRACT.md).
SEVERITIES = ("safety", "repair", "monitor")
#: Message for a result file that is missing.
_MISSING = "file not found in the result folder"

_ANOMALY_NUMERIC = ("delta_t_k", "delta_t_norm_k", "t_max_c", "power_loss_w",
                    "power_loss_w_flight", "energy_loss_kwh_per_year", "confidence")


@dataclass
class ResultData:
    """Everything the report shows, read from one result folder.

    Attributes
    ----------
    result_dir : Path
    summary : dict
        ``summary.json`` as read.
    modules : pandas.DataFrame
        One row per module: the properties of ``modules.geojson`` plus ``geometry``
        (shapely polygons in WGS84 lon/lat).
    anomalies : pandas.DataFrame
        One row per anomaly in priority order (1 first): the properties of
        ``anomalies.geojson`` merged with the work-order columns (action, table_row,
        table_col, lon, lat ...), plus ``geometry`` (affected region, WGS84).
    workorders : pandas.DataFrame
        ``workorders.csv`` as read (may be empty).
    """

    result_dir: Path
    summary: dict
    modules: pd.DataFrame
    anomalies: pd.DataFrame
    workorders: pd.DataFrame
    notes: list[str] = field(default_factory=list)

    # ------------------------------------------------------------------ derived facts
    @property
    def site_name(self) -> str:
        site = self.summary.get("site")
        if isinstance(site, Mapping):
            return str(site.get("name") or "unnamed site")
        return str(site or get_path(self.summary, "inputs.site", default="unnamed site"))

    @property
    def flight_id(self) -> str:
        return str(get_path(self.summary, "flight.id", "flight_id", "inputs.flight_id", default=""))

    @property
    def flight_start(self) -> str:
        return str(get_path(self.summary, "flight.start", "start", default=""))

    @property
    def flight_end(self) -> str:
        return str(get_path(self.summary, "flight.end", "end", default=""))

    @property
    def layout_shift_m(self) -> tuple[float, float]:
        shift = get_path(self.summary, "layout_shift_m", "registration.shift_m", default=[0.0, 0.0])
        try:
            dx, dy = float(shift[0]), float(shift[1])
        except (TypeError, ValueError, IndexError, KeyError):
            return (0.0, 0.0)
        if not (math.isfinite(dx) and math.isfinite(dy)):
            return (0.0, 0.0)
        return (dx, dy)

    def counts(self) -> pd.DataFrame:
        """Anomaly counts, defect (rows) x severity (columns), with totals."""
        an = self.anomalies
        if an.empty:
            return pd.DataFrame(columns=[*SEVERITIES, "total"])
        tab = pd.crosstab(an["defect"].fillna("unknown"), an["severity"].fillna("monitor"))
        for sev in SEVERITIES:
            if sev not in tab.columns:
                tab[sev] = 0
        extra = [c for c in tab.columns if c not in SEVERITIES]
        tab = tab[[*SEVERITIES, *extra]]
        tab["total"] = tab.sum(axis=1)
        return tab.sort_values(["total"], ascending=False)

    def loss_by_defect(self) -> pd.DataFrame:
        """Sum of power loss at STC [W] and energy loss [kWh/yr] per defect class."""
        an = self.anomalies
        if an.empty:
            return pd.DataFrame(columns=["count", "power_loss_w", "energy_loss_kwh_per_year"])
        grouped = an.groupby(an["defect"].fillna("unknown"))
        out = pd.DataFrame({
            "count": grouped.size(),
            "power_loss_w": grouped["power_loss_w"].sum(min_count=1),
            "energy_loss_kwh_per_year": grouped["energy_loss_kwh_per_year"].sum(min_count=1),
        })
        return out.sort_values("power_loss_w", ascending=False, na_position="last")

    def totals(self) -> dict[str, Any]:
        """Totals over all anomalies (an open string is one anomaly, so nothing counts twice)."""
        an = self.anomalies
        power = float(np.nansum(an["power_loss_w"])) if len(an) else 0.0
        energy = float(np.nansum(an["energy_loss_kwh_per_year"])) if len(an) else 0.0
        flight = (float(np.nansum(an["power_loss_w_flight"]))
                  if len(an) and an["power_loss_w_flight"].notna().any() else math.nan)
        nameplate = _num(get_path(self.summary, "loss.plant_pmax_w", "totals.plant_pmax_w", "plant_pmax_w",
                                  "totals.nameplate_w", "plant.pmax_w"))
        if not math.isfinite(nameplate):
            pmax = _num(get_path(self.summary, "inputs.module.pmax_w", "module.pmax_w"))
            if math.isfinite(pmax):
                nameplate = pmax * len(self.modules)
        return {
            "n_modules": float(len(self.modules)),
            "n_anomalies": float(len(an)),
            "n_affected_modules": float(self.modules["defect"].notna().sum())
            if "defect" in self.modules else math.nan,
            "power_loss_w": power,
            "power_loss_w_flight": flight,
            "energy_loss_kwh_per_year": energy,
            "plant_pmax_w": nameplate,
            "plant_share": power / nameplate if math.isfinite(nameplate) and nameplate > 0 else math.nan,
            "yearly_cost": _num(get_path(self.summary, "loss.yearly_cost")),
            "currency": str(get_path(self.summary, "loss.currency", default="") or ""),
        }

    def ortho_paths(self) -> list[Path]:
        """Ortho paths named by summary.json, resolved against the result folder."""
        raw = get_path(self.summary, "inputs.orthos", "inputs.ortho_paths", "inputs.files",
                       "inputs.ortho.paths", "orthos", default=[])
        if isinstance(raw, (str, Path)):
            raw = [raw]
        out: list[Path] = []
        for item in raw if isinstance(raw, Sequence) else []:
            if isinstance(item, Mapping):
                item = item.get("path")
            if not item:
                continue
            p = Path(str(item))
            if p.suffix.lower() not in (".tif", ".tiff", ".vrt", ".img", ""):
                continue
            if not p.is_absolute():
                p = (self.result_dir / p) if (self.result_dir / p).exists() else p.resolve()
            out.append(p)
        return out

    def manifest_path(self) -> Path | None:
        raw = get_path(self.summary, "inputs.flight", "inputs.manifest", "inputs.flight_manifest",
                       "inputs.files.flight")
        if not isinstance(raw, (str, Path)):
            return None
        p = Path(raw)
        if not p.is_absolute() and (self.result_dir / p).exists():
            p = self.result_dir / p
        return p if p.exists() else None


def detection_limit(summary: Mapping, spreads: float) -> tuple[float, float] | None:
    """The scatter of the healthy modules [K] (the ``module_spread`` check's ``module_spread_k``:
    robust spread of module against module) and ``[report] detection_limit_spreads`` times it
    [K]: a fault that warms a module by less is inside the healthy scatter of this flight and may
    be missed (faint PID, light soiling). The factor is the one the run recorded (summary.json
    ``settings.report``), else ``spreads``. None when the result does not record the spread."""
    rec_spreads = _num(get_path(summary, "settings.report.detection_limit_spreads", default=None))
    if math.isfinite(rec_spreads) and rec_spreads > 0:
        spreads = rec_spreads
    rec = get_path(summary, "validity", default=None)
    checks = rec.get("checks") if isinstance(rec, Mapping) else None
    if not isinstance(checks, Sequence) or isinstance(checks, str):
        return None
    for c in checks:
        if isinstance(c, Mapping) and c.get("name") == "module_spread":
            k = _num(c.get("module_spread_k"))
            if math.isfinite(k) and k > 0:
                return k, spreads * k
    return None


def validity_checks(summary: Mapping) -> tuple[list[dict], bool | None]:
    """The acquisition-validity checks of summary.json as a list of plain dicts.

    Accepts a ``validity`` record (at the top level or under ``conditions``) holding
    ``checks`` as a list of dicts or a mapping ``name -> dict``. Each returned dict has
    ``name, value, limit, unit, passed (bool|None), source, kind ('min'|'max'|None)``.
    The second value is the overall verdict (None when unknown).
    """
    rec = get_path(summary, "validity", "conditions.validity", "acquisition.validity", default=None)
    if rec is None:
        return [], None
    checks_raw: Any = rec.get("checks", rec) if isinstance(rec, Mapping) else rec
    items: list[tuple[str, Any]] = []
    if isinstance(checks_raw, Mapping):
        items = [(str(k), v) for k, v in checks_raw.items() if isinstance(v, Mapping)]
    elif isinstance(checks_raw, Sequence) and not isinstance(checks_raw, str):
        items = [(str(v.get("name", f"check {i + 1}")), v) for i, v in enumerate(checks_raw)
                 if isinstance(v, Mapping)]
    checks = []
    for name, c in items:
        passed = c.get("passed", c.get("ok", c.get("pass")))
        kind = c.get("kind") or c.get("op") or c.get("comparison")
        limit = c.get("limit")
        if limit is None and c.get("min") is not None:
            limit, kind = c.get("min"), kind or "min"
        if limit is None and c.get("max") is not None:
            limit, kind = c.get("max"), kind or "max"
        kind = {">=": "min", ">": "min", "<=": "max", "<": "max", "minimum": "min",
                "maximum": "max"}.get(str(kind), kind)
        value, limit_num = _num(c.get("value")), _num(limit)
        if kind not in ("min", "max") and isinstance(passed, bool) and math.isfinite(value) \
                and math.isfinite(limit_num) and value != limit_num:
            # infer the direction from the verdict
            kind = "min" if (value > limit_num) == passed else "max"
        checks.append({
            "name": name,
            "value": c.get("value"),
            "limit": limit,
            "unit": str(c.get("unit") or ""),
            "passed": passed if isinstance(passed, bool) else None,
            "source": str(c.get("source") or ""),
            "kind": kind if kind in ("min", "max") else None,
            "note": str(c.get("message") or c.get("note") or ""),
        })
    ok = rec.get("ok", rec.get("valid", rec.get("passed"))) if isinstance(rec, Mapping) else None
    if not isinstance(ok, bool):
        verdicts = [c["passed"] for c in checks if c["passed"] is not None]
        ok = all(verdicts) if verdicts else None
    return checks, ok


def _features(path: Path) -> pd.DataFrame:
    from pvscan.io.geojson import shapes, written_document

    # the document itself when this process just wrote the file (``pvscan inspect``), else parsed
    obj = written_document(path)
    if obj is None:
        obj = read_json_file(path, OutputError, _MISSING)
    if not isinstance(obj, Mapping) or obj.get("type") != "FeatureCollection":
        raise OutputError(f"{path}: not a GeoJSON FeatureCollection")
    rows, members = [], []
    for i, feat in enumerate(obj.get("features") or []):
        if not isinstance(feat, Mapping):
            raise OutputError(f"{path}: feature {i} is not an object")
        rows.append(dict(feat.get("properties") or {}))
        members.append(feat.get("geometry"))

    def bad(i: int, exc: Exception) -> None:
        if not isinstance(exc, (ValueError, TypeError, AttributeError, KeyError)):
            raise exc
        fid = rows[i].get("anomaly_id", rows[i].get("module_id", i))
        raise OutputError(f"{path}: feature {fid}: invalid geometry ({exc})") from None

    geoms = shapes(members, bad)
    frame = pd.DataFrame(rows)
    if len(rows):
        frame["geometry"] = geoms
    return frame


def _read_workorders(path: Path) -> pd.DataFrame:
    if not path.exists():
        return pd.DataFrame()
    try:
        return pd.read_csv(path, dtype={"module_id": str, "table_id": str, "anomaly_id": str,
                                        "string_id": str})
    except pd.errors.EmptyDataError:
        return pd.DataFrame()
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise OutputError(f"{path}: not a readable CSV: {exc}") from None


def _merge_anomalies(anomalies: pd.DataFrame, workorders: pd.DataFrame,
                     modules: pd.DataFrame) -> pd.DataFrame:
    an = anomalies.copy()
    defaults: dict[str, Any] = {
        "anomaly_id": None, "module_id": None, "defect": "unknown", "severity": "monitor",
        "priority": np.nan, "action": None, "table_id": None, "table_row": np.nan,
        "table_col": np.nan, "lon": np.nan, "lat": np.nan, "module_ids": None,
        "loss_method": None, "iec_class": None, "region": None, "other_defects": None,
    }
    for col in _ANOMALY_NUMERIC:
        defaults[col] = np.nan
    for col, val in defaults.items():
        if col not in an.columns:
            an[col] = val
    if not workorders.empty:
        wo = workorders.copy()
        key = "anomaly_id" if ("anomaly_id" in wo and an["anomaly_id"].notna().all()) else "priority"
        if key in wo:
            an[key + "_key"] = an[key].astype(str)
            wo[key + "_key"] = wo[key].astype(str)
            take = [c for c in wo.columns if c != key and c != key + "_key"]
            wo = wo.drop_duplicates(key + "_key").set_index(key + "_key")[take]
            for col in take:
                mapped = an[key + "_key"].map(wo[col])
                if col not in an.columns:
                    an[col] = mapped.to_numpy()
                else:
                    an[col] = an[col].where(an[col].notna(), mapped)
            an = an.drop(columns=[key + "_key"])
    if not modules.empty and "module_id" in modules:
        mod = modules.drop_duplicates("module_id").set_index("module_id")
        for col in ("table_id", "table_row", "table_col", "string_id", "string_index"):
            if col in mod:
                if col not in an.columns:
                    an[col] = np.nan
                an[col] = an[col].where(an[col].notna(), an["module_id"].map(mod[col]))
    for col in _ANOMALY_NUMERIC:
        an[col] = pd.to_numeric(an[col], errors="coerce")
    an["priority"] = pd.to_numeric(an["priority"], errors="coerce")
    an["severity"] = an["severity"].fillna("monitor").astype(str)
    an["defect"] = an["defect"].fillna("unknown").astype(str)
    # lon/lat of the work order; else the region's centroid
    if "geometry" in an:
        cen = [g.centroid if g is not None and not g.is_empty else None for g in an["geometry"]]
        an["lon"] = an["lon"].where(an["lon"].notna(), [c.x if c else np.nan for c in cen])
        an["lat"] = an["lat"].where(an["lat"].notna(), [c.y if c else np.nan for c in cen])
    sev_rank = an["severity"].map({s: i for i, s in enumerate(SEVERITIES)}).fillna(len(SEVERITIES))
    an["_sev_rank"] = sev_rank
    an["_loss_rank"] = -an["power_loss_w"].fillna(0.0)
    # priority order; rows without a priority go last, ordered by severity then loss
    an = an.sort_values(["priority", "_sev_rank", "_loss_rank"], na_position="last", kind="stable")
    an = an.drop(columns=["_sev_rank", "_loss_rank"]).reset_index(drop=True)
    if an["anomaly_id"].isna().any():
        an["anomaly_id"] = [a if isinstance(a, str) and a else f"A{i + 1:04d}"
                            for i, a in enumerate(an["anomaly_id"])]
    an["anomaly_id"] = an["anomaly_id"].astype(str)
    return an


#: The result files :func:`load_result` reads.
_RESULT_FILES = ("summary.json", "modules.geojson", "anomalies.geojson", "workorders.csv")
#: The last folder read: ``{"entry": (identity of its files, ResultData)}`` (one dict
#: lookup to read it, so threads reading other folders do not mix entries up).
_LAST: dict[str, tuple[tuple[Any, ...], ResultData]] = {}


def _identity(root: Path) -> tuple[Any, ...] | None:
    """Device, inode, size and modification time of each result file (None when one of the
    required files is missing): the same tuple means the same files, also after the folder
    was renamed into place."""
    out: list[Any] = []
    for name in _RESULT_FILES:
        try:
            st = (root / name).stat()
        except OSError:
            if name == "workorders.csv":
                out.append(None)
                continue
            return None
        out.append((st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns))
    return tuple(out)


def _copy(data: ResultData, root: Path) -> ResultData:
    """A copy of ``data`` for the folder ``root`` that its user may change freely."""
    import copy

    return ResultData(root, copy.deepcopy(data.summary), data.modules.copy(), data.anomalies.copy(),
                      data.workorders.copy(), list(data.notes))


def load_result(result_dir: str | os.PathLike[str]) -> ResultData:
    """Read a result folder written by ``pvscan inspect``.

    Parameters
    ----------
    result_dir : path-like
        Folder holding ``modules.geojson``, ``anomalies.geojson``, ``summary.json`` and
        (optionally) ``workorders.csv``.

    Returns
    -------
    ResultData

    Raises
    ------
    OutputError
        When the folder or a required file is missing or unreadable.

    Notes
    -----
    The last folder read is remembered by the identity of its files (device, inode, size,
    modification time): reading the same files again (the end-of-run summary after the
    report, the folder renamed into place in between) returns a copy without parsing them.
    """
    root = Path(result_dir)
    if not root.is_dir():
        raise OutputError(f"{root}: result folder not found")
    key = _identity(root)
    last = _LAST.get("entry")
    if key is not None and last is not None and last[0] == key:
        return _copy(last[1], root)
    data = _load(root)
    if key is not None:
        _LAST["entry"] = (key, data)
    return _copy(data, root)


def _load(root: Path) -> ResultData:
    summary = read_json_file(root / "summary.json", OutputError, _MISSING)
    if not isinstance(summary, Mapping):
        raise OutputError(f"{root / 'summary.json'}: expected a JSON object")
    modules = _features(root / "modules.geojson")
    for col in ("module_id", "table_id", "defect"):
        if col not in modules.columns:
            modules[col] = None
    for col in ("t_mean_c", "t_median_c", "t_p95_c", "t_max_c", "t_min_c", "reference_c",
                "delta_t_k", "delta_t_norm_k", "power_loss_w", "valid_fraction"):
        modules[col] = pd.to_numeric(modules[col], errors="coerce") if col in modules else np.nan
    if len(modules):
        modules["module_id"] = modules["module_id"].astype(str)
    anomalies = _features(root / "anomalies.geojson")
    workorders = _read_workorders(root / "workorders.csv")
    anomalies = _merge_anomalies(anomalies, workorders, modules)
    return ResultData(root, dict(summary), modules, anomalies, workorders)
