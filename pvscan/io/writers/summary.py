"""``summary.json`` (inputs, conditions, counts, losses, cautions) and the check of a whole
result folder against its JSON Schemas."""
from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pvscan.errors import OutputError
from pvscan.io.resources import describe_error, load_schema, schema_errors
from pvscan.io.writers.atomic import atomic_write
from pvscan.io.writers.geojson import validate_geojson_rfc7946
from pvscan.io.writers.geometry import anomaly_indices
from pvscan.io.writers.values import dumps, to_jsonable
from pvscan.io.writers.workorders import read_workorders_csv

__all__ = ["SAFETY_CAUTIONS", "safety_cautions", "build_summary", "write_summary", "validate_output",
           "conditions_with_units", "CONDITION_KEYS"]

#: The cautions of every result: ``summary.json`` ``safety``, the report, ``pvscan history
#: changes`` (our own wording; local codes and the site's rules come first). One item per
#: hazard: live DC, arcs and fire, hot surfaces, who may do the work, drone flights, and that
#: findings are estimates.
SAFETY_CAUTIONS = (
    "PV modules and strings are live (DC) whenever light falls on them, even when the inverter or "
    "the string is disconnected: daylight alone energises them, and DC circuits cannot be switched "
    "off from the array side.",
    "Damaged connectors, junction boxes and bypass diodes can arc and start fires; DC arcs do not "
    "go out by themselves. Keep clear of smoking or charred parts and follow the site's emergency "
    "procedure.",
    "Hot spots, junction boxes and modules in the sun can be hot enough to burn skin; let them cool "
    "or wear suitable protective equipment.",
    "Only qualified, licensed and authorised people may open, test or repair PV electrical equipment, "
    "under the local electrical codes and the site's safety rules (lock-out, permits, protective "
    "equipment).",
    "Drone flights must follow the local aviation rules and the site's permissions; keep clear of "
    "people, overhead lines and operating machinery.",
    "The findings are estimates from thermal imaging: confirm each one on site, with suitable "
    "instruments, before acting on it.",
)


def safety_cautions() -> list[str]:
    """:data:`SAFETY_CAUTIONS` as a list (``summary.json`` ``safety``; plain words, deferring to local rules)."""
    return list(SAFETY_CAUTIONS)


def _counts(values: Iterable) -> dict[str, int]:
    out: dict[str, int] = {}
    for v in values:
        if v is None or (isinstance(v, float) and math.isnan(v)):
            continue
        out[str(v)] = out.get(str(v), 0) + 1
    return dict(sorted(out.items()))


def _fsum(series: Any) -> float:
    vals = pd.to_numeric(pd.Series(series), errors="coerce").to_numpy(dtype=float)
    vals = vals[np.isfinite(vals)]
    return float(vals.sum()) if vals.size else 0.0


#: Condition keys as the conditions stage names them (pvlib's glossary) -> the key in
#: ``summary.json``, with its unit as everywhere else in the outputs.
CONDITION_KEYS = {
    "poa_global": "poa_global_w_m2", "poa_global_min": "poa_global_min_w_m2",
    "poa_global_max": "poa_global_max_w_m2", "poa_global_std": "poa_global_std_w_m2",
    "temp_air": "temp_air_c", "wind_speed": "wind_speed_m_s", "wind_speed_max": "wind_speed_max_m_s",
    "temp_sky": "temp_sky_c", "relative_humidity": "relative_humidity_pct",
}


def conditions_with_units(conditions: Mapping | None) -> dict:
    """The flight conditions for ``summary.json``: keys with their units (:data:`CONDITION_KEYS`),
    and without ``start``/``end``, which ``flight`` already holds."""
    out = {}
    for k, v in dict(conditions or {}).items():
        if k in ("start", "end"):
            continue
        out[CONDITION_KEYS.get(k, k)] = v
    return out


def build_summary(*, modules: Any, anomalies: pd.DataFrame | None, module_spec: Any=None,
                  inputs: Mapping | None = None, conditions: Mapping | None = None,
                  validity: Any = None, registration: Any = None,
                  layout_shift_m: Sequence[float] = (0.0, 0.0), pipeline_path: Any=None,
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
        affected.update(anomaly_indices(row))
    loss = {
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
        "conditions": to_jsonable(conditions_with_units(conditions)),
        "validity": to_jsonable(validity) if validity is not None else None,
        "counts": {
            "modules": n,
            "modules_affected": len(affected),
            "anomalies": int(len(an)),
            "by_defect": _counts(an["defect"]) if "defect" in an.columns else {},
            "by_severity": _counts(an["severity"]) if "severity" in an.columns else {},
        },
        "loss": loss,
        "power_loss_w": round(total_stc, 3),
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
    return atomic_write(path, dumps(doc, indent=2))



def validate_output(out_dir: str | os.PathLike) -> dict[str, list[str]]:
    """Check every output file in ``out_dir`` against its JSON Schema (and RFC 7946 for GeoJSON).

    Returns a mapping ``file name -> problems`` (empty lists when valid); files that do not
    exist are reported as missing (``workorders.gpx``, optional, is checked when present).
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
        row_schema = load_schema("workorders.schema.json")
        probs = []
        for k, row in enumerate(read_workorders_csv(p)):
            probs += [f"row {k + 1}: {describe_error(e)}" for e in schema_errors(row, row_schema)]
        report["workorders.csv"] = probs
    else:
        report["workorders.csv"] = ["missing"]
    g = out_dir / "workorders.gpx"
    if g.exists():
        report["workorders.gpx"] = _gpx_problems(g, None if report["workorders.csv"] == ["missing"]
                                                 else len(read_workorders_csv(p)))
    return report


def _gpx_problems(path: Path, n_rows: int | None) -> list[str]:
    """A GPX 1.1 document with one waypoint per work order (XML well-formed, GPX namespace)."""
    import xml.etree.ElementTree as ET

    from pvscan.io.writers.gpx import GPX_NAMESPACE

    try:
        root = ET.parse(path).getroot()
    except ET.ParseError as exc:
        return [f"not well-formed XML: {exc}"]
    if root.tag != f"{{{GPX_NAMESPACE}}}gpx" or root.get("version") != "1.1":
        return ["not a GPX 1.1 document"]
    n = len(root.findall(f"{{{GPX_NAMESPACE}}}wpt"))
    if n_rows is not None and n > n_rows:
        return [f"{n} waypoints for {n_rows} work orders"]
    return []
