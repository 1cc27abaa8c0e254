"""Site history: maintenance logs, failed repairs, trends and the history commands.

The invented site and its flights are built by ``history_site``.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from click.testing import CliRunner
from history_site import (
    AFTER,
    BEFORE,
    U0,
    U1,
    make_site,
    props_by_module,
    sha,
)

from pvscan import history as H
from pvscan.cli.main import cli
from pvscan.errors import HistoryError, OutputError
from pvscan.io.resources import load_schema, schema_errors


@pytest.fixture
def site(tmp_path):
    return make_site(tmp_path)


def test_maintenance_csv_errors_name_the_line(tmp_path, site):
    H.add_flight(site["db"], site["a"])
    bad = tmp_path / "bad.csv"
    bad.write_text("date,module_id,action,note\n2026-05-01,T01-R1-C01,repair,ok\n"
                   "2026-05-02,T01-R1-C02,paint,no\n")
    with pytest.raises(HistoryError, match=r"bad.csv: line 3: action 'paint'"):
        H.import_maintenance(site["db"], bad)
    bad.write_text("date,module_id,action,note\n05/01/2026,T01-R1-C01,repair,\n")
    with pytest.raises(HistoryError, match="line 2: date"):
        H.import_maintenance(site["db"], bad)
    bad.write_text("when,module_id,action\n")
    with pytest.raises(HistoryError, match="missing column date"):
        H.import_maintenance(site["db"], bad)
    unknown = tmp_path / "unknown.csv"
    unknown.write_text("date,module_id,action,note\n2026-05-01,T01-R1-C01,replace,\n2026-05-01,T09-R9-C99,replace,\n")
    before = sha(site["db"])
    with pytest.raises(HistoryError, match=r"unknown.csv: line 3: module_id 'T09-R9-C99' is not in the site layout"):
        H.import_maintenance(site["db"], unknown)
    assert sha(site["db"]) == before  # nothing imported


def test_maintenance_csv_as_spreadsheets_write_it(tmp_path, site):
    """';' separators (spreadsheets with a decimal comma), capitalised headers with spaces, a
    byte-order mark and actions in capitals are read as the plain form."""
    H.add_flight(site["db"], site["a"])
    semi = tmp_path / "semi.csv"
    semi.write_bytes("\ufeffDate;Module ID;Action;Note\n2026-05-20;T01-R1-C05;Replace;swapped, same type\n"
                     "2026-06-02;T02-R2-C02;CLEAN;\n".encode("utf-8"))
    ev = H.read_maintenance_csv(semi)
    assert ev[["date", "module_id", "action", "note"]].values.tolist() == [
        ["2026-05-20", "T01-R1-C05", "replace", "swapped, same type"], ["2026-06-02", "T02-R2-C02", "clean", ""]]
    tabbed = tmp_path / "tab.csv"
    tabbed.write_text("DATE\tMODULE_ID\tACTION\n2026-05-20\tT01-R1-C05\treplace\n")
    assert H.read_maintenance_csv(tabbed)["module_id"].tolist() == ["T01-R1-C05"]
    res = H.import_maintenance(site["db"], semi)
    assert (res.n_read, res.n_added) == (2, 2)
    plain = tmp_path / "plain.csv"
    plain.write_text("date,module_id,action,note\n2026-05-20,T01-R1-C05,replace,\"swapped, same type\"\n")
    assert H.import_maintenance(site["db"], plain).n_added == 0  # the same event, already stored


def test_repair_that_did_not_help_is_persists_after_repair(site, tmp_path):
    """A hot spot recorded as replaced (and one as repaired) between the flights and still
    there in the later flight is a failed repair, listed first; a cleaning does not explain
    a hot cell, so that one stays an ordinary change."""
    H.add_flight(site["db"], site["a"])
    H.add_flight(site["db"], site["b"])
    ev = tmp_path / "ev.csv"
    ev.write_text("date,module_id,action,note\n2026-05-20,T01-R1-C01,replace,new module fitted\n"
                  "2026-05-21,T01-R1-C02,repair,connector redone\n2026-05-21,T02-R2-C01,clean,washed\n"
                  "2026-01-01,T01-R1-C04,replace,before both flights\n")
    H.import_maintenance(site["db"], ev)
    fc = H.compare_flights(site["db"])
    p = props_by_module(fc)
    assert p["T01-R1-C01"]["change"] == "persists_after_repair"
    assert p["T01-R1-C01"]["maintenance_events"] == [{"date": "2026-05-20", "action": "replace",
                                                      "note": "new module fitted"}]
    assert p["T01-R1-C02"]["change"] == "persists_after_repair"  # and it got worse
    assert p["T02-R2-C01"]["change"] == "persisting"  # cleaning does not fix a hot cell
    assert p["T01-R1-C04"]["change"] == "improved"  # the replacement was before both flights
    assert fc["counts"]["persists_after_repair"] == 2
    assert [f["properties"]["change"] for f in fc["features"][:2]] == ["persists_after_repair"] * 2
    assert schema_errors(fc, load_schema("changes.schema.json")) == []
    r = run(["history", "changes", site["db"], "--out", tmp_path / "c.geojson"])
    assert r.exit_code == 0, r.output
    lines = r.stdout.splitlines()
    assert lines[0].split(": ", 1)[1].startswith("2 persists after repair, ")
    assert "failed repairs" in lines[1] and lines[2].strip().startswith("T01-R1-C01: hot_cell -> hot_cell")
    assert "2026-05-20 replace (new module fitted)" in lines[2]


def test_normalised_rise_against_pvlib_faiman():
    """pvlib.temperature.faiman gives T_m of a module following Faiman (2008) at any G, v;
    normalising its rise must give the rise at 1000 W/m2 and 1 m/s in every condition."""
    from pvlib.temperature import faiman

    rng = np.random.default_rng(3)
    g = rng.uniform(600, 1100, 50)
    v = rng.uniform(0, 8, 50)
    ta = rng.uniform(-5, 38, 50)
    tm = faiman(g, ta, v, u0=U0, u1=U1)
    got = H.normalised_rise(tm, ta, g, v, U0, U1)
    ref = faiman(1000.0, 0.0, 1.0, u0=U0, u1=U1)
    np.testing.assert_allclose(got, ref, rtol=1e-12)  # exact algebra: float64 rounding only
    assert math.isnan(H.normalised_rise(40.0, 20.0, 0.0, 1.0))


def test_trend_counts_losses_and_plots(site, tmp_path):
    H.add_flight(site["db"], site["b"])
    H.add_flight(site["db"], site["a"])
    tr = H.site_trend(site["db"])
    fl = tr.flights
    assert list(fl["flight_id"]) == ["HF-2026-04", "HF-2026-07"]
    assert list(fl["count_hot_cell"]) == [6, 3]
    assert list(fl["count_open_string"]) == [1, 1]
    assert list(fl["severity_safety"]) == [1, 0]
    assert list(fl["n_anomalies"]) == [len(BEFORE), len(AFTER)]
    # module shares of the open string add up to the run's loss: no double count
    assert fl["total_power_loss_w"].tolist() == pytest.approx(
        [sum(a["loss"] for a in BEFORE), sum(a["loss"] for a in AFTER)])
    assert fl["total_energy_loss_kwh_per_year"].tolist() == pytest.approx(
        [1.15 * sum(a["loss"] for a in BEFORE), 1.15 * sum(a["loss"] for a in AFTER)])
    # healthy modules follow Faiman: the normalised rise is 1000 / (u0 + u1) in both seasons
    assert fl["median_rise_norm_k"].tolist() == pytest.approx([1000 / (U0 + U1)] * 2, abs=0.5)
    assert fl["median_t_module_c"].iloc[1] > fl["median_t_module_c"].iloc[0] + 15
    assert len(tr.modules) == 48
    assert list(tr.modules.columns[:3]) == ["flight_id", "start", "module_id"]
    out = tmp_path / "trend"
    paths = H.write_trend(tr, out)
    assert sorted(p.name for p in paths) == ["counts.png", "flights.csv", "loss.png", "modules.csv",
                                             "temperature.png"]
    for p in paths:
        assert p.stat().st_size > 0
    assert (out / "counts.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(OutputError, match="not empty"):
        H.write_trend(tr, out)
    H.write_trend(tr, out, overwrite=True)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".trend")]


# ------------------------------------------------------------------------------------------
# CLI


def run(args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def test_cli_commands(site, tmp_path):
    r = run(["history", "add", site["db"], site["a"]])
    assert r.exit_code == 0, r.output
    assert "created site history" in r.stdout
    r = run(["history", "add", site["db"], site["a"]])
    assert r.exit_code == 0 and "unchanged" in r.stdout
    assert run(["history", "add", site["db"], site["b"]]).exit_code == 0
    r = run(["history", "maintenance", site["db"], site["events"]])
    assert r.exit_code == 0 and "4 new" in r.stdout
    r = run(["history", "list", site["db"]])
    assert r.exit_code == 0
    assert "HF-2026-04" in r.stdout and "HF-2026-07" in r.stdout
    out = tmp_path / "changes.geojson"
    r = run(["history", "changes", site["db"], "--out", out])
    assert r.exit_code == 0, r.output
    assert "1 new, 5 persisting, 2 worsened, 1 improved, 4 resolved" in r.stdout
    assert "qualified" in r.stdout  # the on-site caution accompanies suspicious resolutions
    fc = json.loads(out.read_text())
    assert fc["type"] == "FeatureCollection" and len(fc["features"]) == 13
    # like every writer, changes replaces an existing file only with --overwrite
    before = out.read_bytes()
    r = run(["history", "changes", site["db"], "--from", "HF-2026-07", "--to", "HF-2026-04", "--out", out])
    assert r.exit_code == 1 and "--overwrite" in r.stderr and out.read_bytes() == before
    r = run(["history", "changes", site["db"], "--from", "HF-2026-07", "--to", "HF-2026-04", "--out", out,
             "--overwrite"])
    assert r.exit_code == 0, r.output
    assert json.loads(out.read_text())["flight_before"]["flight_id"] == "HF-2026-07"
    r = run(["history", "trend", site["db"], "--out", tmp_path / "tr"])
    assert r.exit_code == 0, r.output
    assert (tmp_path / "tr" / "loss.png").exists()


def test_cli_errors_are_one_line(site, tmp_path):
    junk = tmp_path / "junk.gpkg"
    junk.write_bytes(b"not a database at all" * 10)
    for args in (["history", "add", junk, site["a"]],
                 ["history", "list", tmp_path / "none.gpkg"],
                 ["history", "add", site["db"], tmp_path / "no_such_dir"],
                 ["history", "changes", junk, "--out", tmp_path / "c.geojson"]):
        r = run(args)
        assert r.exit_code == 1, (args, r.output)
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("pvscan: error: "), r.stderr
        assert "Traceback" not in r.output
    assert not (tmp_path / "c.geojson").exists()
    r = run(["history", "changes", site["db"]])  # --out missing: click usage error
    assert r.exit_code == 2
