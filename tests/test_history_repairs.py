"""A failed repair on simulated flights: `history maintenance` records a replacement of a
module whose hot spot is still there in the next flight, and `history changes` reports that
module as `persists_after_repair`, first (library, CLI and schema)."""
from __future__ import annotations

import json
import shutil
import warnings

import pytest
from click.testing import CliRunner
from conftest import test_seed

from pvscan.cli.main import cli
from pvscan.errors import RegistrationWarning, ValidityWarning
from pvscan.io.resources import load_schema, schema_errors

SEED = test_seed()


def run(args):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.mark.slow
def test_replaced_module_whose_hot_spot_stays_is_a_failed_repair(tmp_path):
    from pvscan.pipeline import inspect_flight
    from pvscan.simulate import simulate_flight

    scenario = {"site": {"name": "Curlew Bank (invented)", "lon": 7.4, "lat": 47.3},
                "array": {"table_rows": 2, "tables_per_row": 2, "rows": 2, "cols": 10},
                "flight": {"start": "2026-06-14T10:40:00+02:00"},
                "defects": {"hot_cell": 3, "bypassed_substring": 1, "hot_cell_rise_k": [14.0, 20.0]}}
    simulate_flight(scenario, tmp_path / "june", seed=SEED)
    # the next flight of the same site, two months later: the same plant as flown, a new start
    shutil.copytree(tmp_path / "june", tmp_path / "august")
    toml = (tmp_path / "august" / "flight.toml").read_text()
    assert 'start = "2026-06-14T10:40:00+02:00"' in toml
    toml = toml.replace('start = "2026-06-14T', 'start = "2026-08-14T')
    toml = toml.replace('end = "2026-06-14T', 'end = "2026-08-14T')
    (tmp_path / "august" / "flight.toml").write_text(toml)
    results = []
    for name in ("june", "august"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RegistrationWarning)  # small site: weak fit is not the subject
            warnings.simplefilter("ignore", ValidityWarning)
            inspect_flight(tmp_path / name / "flight.toml", out_dir=tmp_path / f"out_{name}", report=False)
        results.append(tmp_path / f"out_{name}")
    db = tmp_path / "curlew.gpkg"
    for r in results:
        res = run(["history", "add", db, r])
        assert res.exit_code == 0, res.output

    anomalies = json.loads((results[0] / "anomalies.geojson").read_text())["features"]
    hot = sorted(f["properties"]["module_id"] for f in anomalies if f["properties"]["defect"] == "hot_cell")
    assert hot, f"seed {SEED}: no hot cell found in the first flight"
    target = hot[0]
    events = tmp_path / "events.csv"
    events.write_text(f"Date;Module ID;Action;Note\n2026-07-02;{target};Replace;module swapped\n")
    res = run(["history", "maintenance", db, events])
    assert res.exit_code == 0 and "1 new" in res.stdout, res.output

    out = tmp_path / "changes.geojson"
    res = run(["history", "changes", db, "--out", out])
    assert res.exit_code == 0, res.output
    fc = json.loads(out.read_text())
    assert schema_errors(fc, load_schema("changes.schema.json")) == []
    first = fc["features"][0]["properties"]
    assert first["module_id"] == target and first["change"] == "persists_after_repair"
    assert first["maintenance_events"] == [{"date": "2026-07-02", "action": "replace", "note": "module swapped"}]
    assert fc["counts"]["persists_after_repair"] == 1
    others = [f["properties"] for f in fc["features"][1:]]
    assert all(p["change"] != "persists_after_repair" for p in others)
    # listed first in the CLI summary, with the maintenance entry
    lines = res.stdout.splitlines()
    assert lines[0].split(": ", 1)[1].startswith("1 persists after repair")
    assert lines[2].strip().startswith(f"{target}: hot_cell -> ") and "2026-07-02 replace (module swapped)" in lines[2]
