"""Site history under concurrency: many `pvscan history add` processes at once into a file
that does not exist yet lose nothing.

Each process is a real `pvscan` process (subprocess), started a few hundred milliseconds
apart (seeded) so that some open the file while another is writing its first, big
transaction: SQLite writes the pages of such a transaction before the header page, which is
where a reader could once take the file for a foreign one. Results are synthetic folders in
the form `pvscan inspect` writes them (an invented site, 1,200 modules each).
"""
from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import test_seed

from pvscan import history as H

SEED = test_seed()
N_MODULES = 4000
LON0, LAT0 = 13.40, 52.50  # invented site
DLON, DLAT = 1.5e-5, 3.0e-5  # about 1 m x 3 m [deg]


def _result(folder: Path, i: int, rng) -> Path:
    folder.mkdir(parents=True)
    feats = []
    for k in range(N_MODULES):
        x = LON0 + (k % 40) * DLON * 1.1
        y = LAT0 + (k // 40) * DLAT * 1.2
        ring = [[x, y], [x + DLON, y], [x + DLON, y + DLAT], [x, y + DLAT], [x, y]]
        t = float(rng.normal(45.0, 1.0))
        feats.append({"type": "Feature", "geometry": {"type": "Polygon", "coordinates": [ring]},
                      "properties": {"module_id": f"M{k:05d}", "table_id": f"T{k // 80:03d}",
                                     "t_mean_c": t, "t_median_c": t, "t_p95_c": t + 1, "t_max_c": t + 2,
                                     "t_min_c": t - 2, "t_std_k": 0.5, "valid_fraction": 0.97,
                                     "reference_c": 45.0, "delta_t_k": t - 45.0,
                                     "delta_t_norm_k": t - 45.0, "defect": None, "power_loss_w": 0.0}})
    hot = feats[int(rng.integers(N_MODULES))]
    anomalies = [{"type": "Feature", "geometry": hot["geometry"],
                  "properties": {"anomaly_id": f"{hot['properties']['module_id']}:hot_cell",
                                 "module_id": hot["properties"]["module_id"], "defect": "hot_cell",
                                 "severity": "monitor", "delta_t_k": 12.0, "delta_t_norm_k": 14.0,
                                 "t_max_c": 60.0, "power_loss_w": 10.0, "energy_loss_kwh_per_year": 11.0,
                                 "priority": 1, "confidence": 0.9}}]
    for name, fs in (("modules.geojson", feats), ("anomalies.geojson", anomalies)):
        (folder / name).write_text(json.dumps({"type": "FeatureCollection", "features": fs}))
    day = 1 + i
    (folder / "summary.json").write_text(json.dumps({
        "site": {"name": "Alder Reach (invented)"},
        "flight": {"id": f"AR-{day:02d}", "start": f"2026-05-{day:02d}T10:00:00+02:00",
                   "end": f"2026-05-{day:02d}T10:40:00+02:00"},
        "conditions": {"poa_irradiance_w_m2": 850.0, "ambient_c": 20.0, "wind_m_s": 2.0}}))
    return folder


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    rng = np.random.default_rng(SEED)
    root = tmp_path_factory.mktemp("results")
    return [_result(root / f"r{i:02d}", i, rng) for i in range(16)]


@pytest.mark.parametrize("n", [4, 8, 16])
def test_concurrent_adds_into_a_new_file_store_every_flight(results, tmp_path, n):
    rng = np.random.default_rng(SEED + n)
    db = tmp_path / "site" / "alder.gpkg"  # neither the file nor its folder exists yet
    procs = []
    for d in results[:n]:
        procs.append(subprocess.Popen([sys.executable, "-m", "pvscan.cli.main", "-q", "history", "add",
                                       str(db), str(d)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                      text=True))
        time.sleep(float(rng.uniform(0.0, 0.4)))
    for p in procs:
        out, err = p.communicate(timeout=600)
        assert p.returncode == 0, err
    flights = H.list_flights(db)
    assert sorted(flights["flight_id"]) == [f"AR-{1 + i:02d}" for i in range(n)]
    with sqlite3.connect(db) as con:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        per_flight = dict(con.execute("SELECT flight_id, count(*) FROM module_results GROUP BY flight_id"))
        assert set(per_flight.values()) == {N_MODULES}
        assert con.execute("SELECT count(*) FROM site_modules").fetchone()[0] == N_MODULES
    assert sorted(p.name for p in db.parent.iterdir()) == ["alder.gpkg"]  # no lock or temporary file left


def test_an_empty_file_becomes_the_history(results, tmp_path):
    db = tmp_path / "alder.gpkg"
    db.touch()
    res = H.add_flight(db, results[0])
    assert res.created and res.status == "added"
    assert list(H.list_flights(db)["flight_id"]) == ["AR-01"]
