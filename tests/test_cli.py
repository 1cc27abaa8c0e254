"""CLI conventions: -v/-q before or after the subcommand, rounded numbers from `evaluate`."""
from __future__ import annotations

import logging
import re
import warnings

import pytest
from click.testing import CliRunner
from conftest import test_seed

from pvscan.cli.main import cli, hoist_verbosity
from pvscan.errors import RegistrationWarning, ValidityWarning

SEED = test_seed()


def run(args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def test_hoist_verbosity_moves_only_the_global_flags():
    assert hoist_verbosity(["history", "add", "a.gpkg", "r", "-vv"]) == ["-vv", "history", "add", "a.gpkg", "r"]
    assert hoist_verbosity(["inspect", "f.toml", "-q", "--out", "o"]) == ["-q", "inspect", "f.toml", "--out", "o"]
    assert hoist_verbosity(["report", "--verbose", "r"]) == ["--verbose", "report", "r"]
    # not a verbosity flag, and nothing after "--"
    assert hoist_verbosity(["simulate", "-x", "--", "-v"]) == ["simulate", "-x", "--", "-v"]
    assert hoist_verbosity(["fleet", "--overwrite"]) == ["fleet", "--overwrite"]


def test_console_entry_sets_the_collector_thresholds_for_the_process():
    """``main`` (the console script) sets the garbage collector's thresholds and freezes what
    is alive when the command ends; the click group alone (the library's callers, CliRunner)
    leaves the collector as it was."""
    import gc

    from pvscan.cli.main import GC_THRESHOLDS, main

    before = gc.get_threshold()
    try:
        gc.set_threshold(700, 10, 10)
        gc.unfreeze()
        assert CliRunner().invoke(cli, ["--version"]).exit_code == 0
        assert gc.get_threshold() == (700, 10, 10) and gc.get_freeze_count() == 0
        with pytest.raises(SystemExit) as exc:
            main(["--version"])
        assert exc.value.code == 0
        assert gc.get_threshold() == GC_THRESHOLDS != (700, 10, 10)
        assert gc.get_freeze_count() > 0  # what was alive at the end: no last collection over it
    finally:
        gc.unfreeze()
        gc.set_threshold(*before)


@pytest.mark.parametrize("where", ["before", "after"])
def test_verbosity_flags_before_or_after_the_subcommand(tmp_path, where):
    db = tmp_path / "none.gpkg"
    for flag, level in (("-v", logging.INFO), ("-vv", logging.DEBUG), ("-q", logging.ERROR)):
        args = [flag, "history", "list", db] if where == "before" else ["history", "list", db, flag]
        r = run(args)
        assert r.exit_code == 1, r.output  # the missing file, not a usage error (2)
        assert r.stderr.startswith("pvscan: error: ") and "No such option" not in r.output
        assert logging.getLogger("pvscan").level == level
    r = run(["history", "nope", "-v"])
    assert r.exit_code == 2  # an unknown command stays a usage error


def test_evaluate_prints_rounded_numbers(tmp_path):
    from pvscan.pipeline import inspect_flight
    from pvscan.simulate import simulate_flight

    scenario = {"site": {"name": "Redshank Fen (invented)", "lon": 6.9, "lat": 50.1},
                "array": {"table_rows": 2, "tables_per_row": 1, "rows": 2, "cols": 8},
                "layout": {"offset_m": [0.3, -0.2]},
                "defects": {"hot_cell": 1, "bypassed_substring": 1, "open_module": 1}}
    sim = simulate_flight(scenario, tmp_path / "flight", seed=SEED)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RegistrationWarning)
        warnings.simplefilter("ignore", ValidityWarning)
        inspect_flight(sim.manifest, out_dir=tmp_path / "out", report=False)
    r = run(["evaluate", tmp_path / "flight", tmp_path / "out", "--json", tmp_path / "scores.json"])
    assert r.exit_code == 0, r.output
    numbers = re.findall(r"-?\d+\.\d+", r.stdout)
    assert numbers, r.stdout
    assert max(len(n.split(".")[1]) for n in numbers) <= 3, [n for n in numbers if len(n.split(".")[1]) > 3]
    assert "precision" in r.stdout and "recall" in r.stdout
