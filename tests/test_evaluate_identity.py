"""`pvscan evaluate` scores a result only against the truth of the same flight (site, flight id,
start time), unless told --force; small simulated flights of invented sites."""
from __future__ import annotations

import json

import pytest
from click.testing import CliRunner
from conftest import test_seed

from pvscan.cli.main import cli
from pvscan.errors import MismatchError
from pvscan.evaluate import evaluate
from pvscan.pipeline import inspect_flight
from pvscan.simulate import simulate_flight

SEED = test_seed()


def _scenario(name, start="2026-06-14T10:40:00+02:00"):
    return {"site": {"name": name, "lon": 9.5, "lat": 46.0}, "flight": {"start": start},
            "array": {"table_rows": 2, "tables_per_row": 1, "rows": 2, "cols": 8},
            "defects": {"bypassed_substring": 1}}


@pytest.fixture(scope="module")
def flights(tmp_path_factory):
    root = tmp_path_factory.mktemp("identity")
    a = simulate_flight(_scenario("Identity north (invented)"), root / "a", seed=SEED)
    other_site = simulate_flight(_scenario("Identity south (invented)"), root / "b", seed=SEED)
    later = simulate_flight(_scenario("Identity north (invented)", "2026-08-02T11:00:00+02:00"),
                            root / "c", seed=SEED)
    result = root / "result_a"
    inspect_flight(a.manifest, out_dir=result, report=False)
    return {"a": a.out_dir, "other_site": other_site.out_dir, "later": later.out_dir, "result": result}


def test_same_flight_is_checked_and_scored(flights):
    s = evaluate(flights["a"], flights["result"])
    assert s["flight_check"] == {"checked": ["site", "flight_id", "start"], "differences": [], "forced": False}
    assert s["matched_by"] == "module_id" and s["n_matched"] == s["n_modules"] == 32


@pytest.mark.parametrize("truth, words", [("other_site", ["site", "Identity south"]),
                                          ("later", ["flight id", "start time", "2026-08-02"])])
def test_other_flight_is_refused_unless_forced(flights, truth, words):
    with pytest.raises(MismatchError) as e:
        evaluate(flights[truth], flights["result"])
    assert all(w in str(e.value) for w in words) and "--force" in str(e.value)
    r = CliRunner().invoke(cli, ["evaluate", str(flights[truth]), str(flights["result"])])
    assert r.exit_code == 1
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("pvscan: error:") and "different flights" in lines[0]
    out = flights["result"].parent / f"scores_{truth}.json"
    r = CliRunner().invoke(cli, ["evaluate", str(flights[truth]), str(flights["result"]), "--force",
                                 "--json", str(out)])
    assert r.exit_code == 0, r.output
    assert "different flights" in r.stderr and "DIFFERENT FLIGHTS" in r.stdout
    assert json.loads(out.read_text())["flight_check"]["forced"] is True
