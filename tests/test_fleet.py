"""Fleet runs: one Dask task per flight; a failing flight does not stop the others."""
from __future__ import annotations

import json
import shutil

from click.testing import CliRunner

from pvscan.cli.main import cli
from pvscan.fleet import inspect_fleet
from pvscan.simulate import simulate_flight


def _small(name, lat):
    return {"site": {"name": name, "lon": 9.5, "lat": lat},
            "array": {"table_rows": 2, "tables_per_row": 1, "rows": 2, "cols": 8},
            "defects": {"bypassed_substring": 1}}


def test_fleet_runs_every_flight_and_isolates_failures(tmp_path):
    a = simulate_flight(_small("Fleet test north (invented)", 46.0), tmp_path / "a", seed=1)
    b = simulate_flight(_small("Fleet test south (invented)", -33.0), tmp_path / "b", seed=2)
    bad = tmp_path / "bad"
    shutil.copytree(a.out_dir, bad)
    (bad / "flight.toml").write_text((bad / "flight.toml").read_text().replace("pmax_w", "pmax_kw", 1))
    outcomes = inspect_fleet([a.manifest, b.manifest, bad / "flight.toml"], tmp_path / "out",
                             scheduler="synchronous", report=False)
    assert [o.ok for o in outcomes] == [True, True, False]
    assert "module.pmax_kw" in outcomes[2].error
    for o in outcomes[:2]:
        summary = json.loads((tmp_path / "out").joinpath(o.out_dir, "summary.json").read_text())
        assert summary["counts"]["modules"] == 2 * 2 * 8  # table rows x module rows x cols
        assert summary["counts"]["by_defect"].get("bypassed_substring") == 1
    # the two sites land in their own folders
    assert len({o.out_dir.split("/")[-2] for o in outcomes[:2]}) == 2


def test_fleet_cli_exit_code_on_failure(tmp_path):
    a = simulate_flight(_small("Fleet cli (invented)", 46.0), tmp_path / "a", seed=3)
    r = CliRunner().invoke(cli, ["fleet", str(a.manifest), str(tmp_path / "missing.toml"),
                                 "--out", str(tmp_path / "out"), "--scheduler", "threads",
                                 "--workers", "2", "--no-report"])
    assert r.exit_code == 1
    assert "1 of 2 flights inspected" in r.output
    assert "not found" in r.output


def test_fleet_refuses_two_flights_writing_one_folder_before_any_starts(tmp_path):
    """A copy of a flight (same site, same flight id) would replace the other's results."""
    a = simulate_flight(_small("Fleet twins (invented)", 46.0), tmp_path / "a", seed=4)
    twin = tmp_path / "twin"
    shutil.copytree(a.out_dir, twin)
    out = tmp_path / "out"
    for extra in ([], ["--overwrite"]):
        r = CliRunner().invoke(cli, ["fleet", str(a.manifest), str(twin / "flight.toml"), "--out", str(out),
                                     "--scheduler", "synchronous", "--no-report", *extra])
        assert r.exit_code == 1, r.output
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and "would both write" in lines[0] and "no flight was started" in lines[0]
        assert str(a.manifest) in lines[0] and str(twin / "flight.toml") in lines[0]
        assert not out.exists()
    # the same manifest twice is refused too; another flight id makes the twin welcome
    r = CliRunner().invoke(cli, ["fleet", str(a.manifest), str(a.manifest), "--out", str(out)])
    assert r.exit_code == 1 and "more than once" in r.stderr and not out.exists()
    text = (twin / "flight.toml").read_text()
    (twin / "flight.toml").write_text(text.replace("[flight]\n", "[flight]\nid = \"twin-2\"\n", 1))
    outcomes = inspect_fleet([a.manifest, twin / "flight.toml"], out, scheduler="synchronous", report=False)
    assert [o.ok for o in outcomes] == [True, True] and outcomes[0].out_dir != outcomes[1].out_dir
