"""An invented site for the history tests ("Heron Flats", two tables of 2 x 6 modules): result
folders in the form `pvscan inspect` writes them (modules.geojson, anomalies.geojson,
workorders.csv, summary.json) for flights of different seasons with known changes.

A helper module, not a test module: the history test files import from it.
"""
from __future__ import annotations

import csv
import hashlib
import json
from pathlib import Path

import numpy as np
from pyproj import Transformer
from shapely.geometry import Polygon, mapping

ROOT = Path(__file__).resolve().parent.parent
U0, U1 = 25.0, 6.84  # Faiman defaults of pvlib.temperature.faiman (Faiman 2008)

# Invented plant: UTM zone 33N around an arbitrary point; 2 tables x 2 rows x 6 columns.
_TO_LONLAT = Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
X0, Y0 = 500_000.0, 5_200_000.0
W, L, GAP = 1.04, 2.09, 0.02


def module_ids():
    return [f"T{t:02d}-R{r}-C{c:02d}" for t in (1, 2) for r in (1, 2) for c in range(1, 7)]


def footprint(mid: str, dx: float = 0.0, dy: float = 0.0) -> Polygon:
    t, r, c = int(mid[1:3]), int(mid[5]), int(mid[8:10])
    x = X0 + (c - 1) * (W + GAP) + dx
    y = Y0 + (t - 1) * 10.0 + (r - 1) * (L + GAP) + dy
    ring = [(x, y), (x + W, y), (x + W, y + L), (x, y + L), (x, y)]
    return Polygon([_TO_LONLAT.transform(px, py) for px, py in ring])


def norm_factor(g, v):
    """delta_t_norm_k / delta_t_k per CONTRACT.md: (1000 / G) * U(v) / U(1)."""
    return (1000.0 / g) * (U0 + U1 * v) / (U0 + U1 * 1.0)


def write_result(folder: Path, *, flight_id: str, start: str, end: str, conditions: dict,
                 anomalies: list[dict], seed: int, site: str = "Heron Flats",
                 drop: tuple[str, ...] = (), move: dict | None = None,
                 valid: dict | None = None) -> Path:
    """A result folder of one flight; ``anomalies`` give the normalised delta T [K]."""
    rng = np.random.default_rng(seed)
    g, v, ta = conditions["poa_irradiance_w_m2"], conditions["wind_m_s"], conditions["ambient_c"]
    k = norm_factor(g, v)
    rise = g / (U0 + U1 * v)  # Faiman steady rise of a healthy module [K]
    move = move or {}
    valid = valid or {}
    per_module = {}
    for a in anomalies:
        for m in a.get("module_ids") or [a["module_id"]]:
            per_module.setdefault(m, a)
    feats = []
    for mid in module_ids():
        if mid in drop:
            continue
        ref = ta + rise + rng.normal(0, 0.2)
        a = per_module.get(mid)
        dtn = a["dtn"] if a and a["defect"] in ("bypassed_substring", "open_string", "open_module") \
            else float(rng.normal(0, 0.3))
        dt = dtn / k
        t_med = ref + dt
        feats.append({"type": "Feature", "geometry": mapping(footprint(mid, *move.get(mid, (0, 0)))),
                      "properties": {
                          "module_id": mid, "table_id": mid[:3],
                          "t_mean_c": round(t_med + 0.1, 3), "t_median_c": round(t_med, 3),
                          "t_p95_c": round(t_med + 1.0, 3),
                          "t_max_c": round(t_med + (a["dtn"] / k if a else 1.5), 3),
                          "t_min_c": round(t_med - 1.5, 3), "t_std_k": 0.6,
                          "valid_fraction": valid.get(mid, 0.97), "reference_c": round(ref, 3),
                          "delta_t_k": round(dt, 3), "delta_t_norm_k": round(dtn, 3),
                          "defect": a["defect"] if a else None,
                          "power_loss_w": a.get("loss", 0.0) / len(a.get("module_ids", [1])) if a else 0.0}})
    afeats = []
    for i, a in enumerate(anomalies, start=1):
        mids = a.get("module_ids") or [a["module_id"]]
        afeats.append({"type": "Feature", "geometry": mapping(footprint(mids[0])),
                       "properties": {
                           "anomaly_id": f"{flight_id}-A{i:03d}", "module_id": mids[0],
                           "module_ids": mids, "defect": a["defect"], "severity": a["severity"],
                           "delta_t_k": round(a["dtn"] / k, 3), "delta_t_norm_k": a["dtn"],
                           "t_max_c": 60.0, "power_loss_w": a.get("loss", 0.0),
                           "energy_loss_kwh_per_year": a.get("loss", 0.0) * 1.15,
                           "priority": i, "confidence": 0.9}})
    folder.mkdir(parents=True, exist_ok=True)
    for name, fs in (("modules.geojson", feats), ("anomalies.geojson", afeats)):
        (folder / name).write_text(json.dumps({"type": "FeatureCollection", "features": fs}))
    with open(folder / "workorders.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["priority", "module_id", "defect", "severity"])
        for f in afeats:
            p = f["properties"]
            w.writerow([p["priority"], p["module_id"], p["defect"], p["severity"]])
    summary = {"site": {"name": site}, "flight": {"id": flight_id, "start": start, "end": end},
               "conditions": conditions, "counts": {}, "layout_shift_m": [0.0, 0.0],
               "pvscan_version": "0.1.0"}
    (folder / "summary.json").write_text(json.dumps(summary))
    return folder


# conditions of two seasons: normalised delta T is what stays comparable
SPRING = {"poa_irradiance_w_m2": 720.0, "ambient_c": 12.0, "wind_m_s": 3.5}
SUMMER = {"poa_irradiance_w_m2": 960.0, "ambient_c": 29.0, "wind_m_s": 0.8}

BEFORE = [
    {"module_id": "T01-R1-C01", "defect": "hot_cell", "severity": "repair", "dtn": 12.0, "loss": 20},
    {"module_id": "T01-R1-C02", "defect": "hot_cell", "severity": "monitor", "dtn": 8.0, "loss": 10},
    {"module_id": "T01-R1-C03", "defect": "hot_cell", "severity": "monitor", "dtn": 9.0, "loss": 10},
    {"module_id": "T01-R1-C04", "defect": "bypassed_substring", "severity": "repair", "dtn": 6.0, "loss": 130},
    {"module_id": "T01-R1-C05", "defect": "hot_cell", "severity": "repair", "dtn": 15.0, "loss": 20},
    {"module_id": "T01-R1-C06", "defect": "junction_box", "severity": "safety", "dtn": 25.0, "loss": 5},
    {"module_ids": ["T02-R1-C01", "T02-R1-C02", "T02-R1-C03"], "defect": "open_string",
     "severity": "repair", "dtn": 4.0, "loss": 1200},
    {"module_id": "T02-R2-C01", "defect": "hot_cell", "severity": "monitor", "dtn": 10.0, "loss": 10},
    {"module_id": "T02-R2-C02", "defect": "soiling", "severity": "monitor", "dtn": 3.0, "loss": 8},
    {"module_id": "T02-R2-C03", "defect": "hot_cell", "severity": "monitor", "dtn": 7.0, "loss": 10},
]
AFTER = [
    {"module_id": "T01-R1-C01", "defect": "hot_cell", "severity": "repair", "dtn": 12.8, "loss": 20},
    {"module_id": "T01-R1-C02", "defect": "hot_cell", "severity": "repair", "dtn": 16.0, "loss": 25},
    {"module_id": "T01-R1-C03", "defect": "bypassed_substring", "severity": "repair", "dtn": 5.0, "loss": 130},
    {"module_id": "T01-R1-C04", "defect": "bypassed_substring", "severity": "monitor", "dtn": 2.5, "loss": 130},
    {"module_ids": ["T02-R1-C01", "T02-R1-C02", "T02-R1-C03"], "defect": "open_string",
     "severity": "repair", "dtn": 4.3, "loss": 1200},
    {"module_id": "T02-R2-C01", "defect": "hot_cell", "severity": "monitor", "dtn": 12.4, "loss": 10},
    {"module_id": "T01-R2-C01", "defect": "several_hot_cells", "severity": "repair", "dtn": 14.0, "loss": 40},
]
EXPECTED = {  # module -> (change, repaired, suspicious)
    "T01-R1-C01": ("persisting", False, False),   # +0.8 K, within max(2, 3) K
    "T01-R1-C02": ("worsened", False, False),     # +8 K beyond max(2, 2) K
    "T01-R1-C03": ("worsened", False, False),     # hot cell -> bypassed substring (pattern)
    "T01-R1-C04": ("improved", False, False),     # -3.5 K beyond max(2, 1.5) K
    "T01-R1-C05": ("resolved", True, False),      # replaced between the flights
    "T01-R1-C06": ("resolved", False, True),      # vanished without any maintenance
    "T02-R1-C01": ("persisting", False, False),   # open string, every module of the run
    "T02-R1-C02": ("persisting", False, False),
    "T02-R1-C03": ("persisting", False, False),
    "T02-R2-C01": ("persisting", False, False),   # +2.4 K, within max(2, 2.5) K
    "T02-R2-C02": ("resolved", True, False),      # soiling, cleaned
    "T02-R2-C03": ("resolved", False, True),      # hot cell does not go away by cleaning
    "T01-R2-C01": ("new", False, False),
}
EVENTS = [
    ("2026-05-20", "T01-R1-C05", "replace", "module swapped, same type"),
    ("2026-06-02T09:00:00+02:00", "T02-R2-C02", "clean", "table 2 row 2 washed"),
    ("2026-06-02", "T02-R2-C03", "clean", "table 2 row 2 washed"),
    ("2026-01-10", "T01-R1-C06", "repair", "before both flights: explains nothing"),
]


def make_site(tmp_path):
    """Two flights (spring, summer), a maintenance log and the path of the site database."""
    a = write_result(tmp_path / "r_spring", flight_id="HF-2026-04", start="2026-04-15T10:30:00+02:00",
                     end="2026-04-15T11:10:00+02:00", conditions=SPRING, anomalies=BEFORE, seed=1)
    b = write_result(tmp_path / "r_summer", flight_id="HF-2026-07", start="2026-07-09T12:05:00+02:00",
                     end="2026-07-09T12:50:00+02:00", conditions=SUMMER, anomalies=AFTER, seed=2)
    ev = tmp_path / "events.csv"
    with open(ev, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["date", "module_id", "action", "note"])
        w.writerows(EVENTS)
    return {"a": a, "b": b, "events": ev, "db": tmp_path / "heron.gpkg", "tmp": tmp_path}


def sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def props_by_module(fc):
    return {f["properties"]["module_id"]: f["properties"] for f in fc["features"]}
