"""Faults while writing: a full disk, a killed run, a run still going beside another.

Real processes and real failures: `pvscan` runs as a subprocess; a full disk is a file-size
limit (RLIMIT_FSIZE, with SIGXFSZ ignored the kernel fails the write with EFBIG exactly where
a full disk fails it with ENOSPC, in Python's writes and in GDAL's GeoPackage commit alike);
a killed run is a SIGKILL. Every failure must end in one line naming the file, exit code 1,
and nothing in --out; a rerun must leave no staging folder behind.
"""
from __future__ import annotations

import os
import resource
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import test_seed

from pvscan.errors import OutputError
from pvscan.io.locking import try_lock
from pvscan.io.outputs import clean_stale_staging, staging_dir
from pvscan.simulate import simulate_flight

SEED = test_seed()
PVSCAN = [sys.executable, "-m", "pvscan.cli.main"]
ORDER = ["modules.geojson", "anomalies.geojson", "workorders.csv", "workorders.gpx", "pvscan.gpkg", "summary.json",
         "report.html"]


def _scenario():
    return {"site": {"name": "Fault test field (invented)", "lon": 11.2, "lat": 47.9},
            "array": {"table_rows": 3, "tables_per_row": 2, "rows": 2, "cols": 10},
            "defects": {"hot_cell": 1, "bypassed_substring": 1, "open_module": 1}}


@pytest.fixture(scope="module")
def flight(tmp_path_factory):
    root = tmp_path_factory.mktemp("faults")
    sim = simulate_flight(_scenario(), root / "flight", seed=SEED)
    ref = root / "reference"
    r = subprocess.run([*PVSCAN, "-q", "inspect", str(sim.manifest), "--out", str(ref)],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    return {"manifest": sim.manifest, "sizes": {n: (ref / n).stat().st_size for n in ORDER}}


def _leftovers(out: Path) -> list[str]:
    return sorted(p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}."))


def _limit_files(limit: int):
    def pre():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
    return pre


@pytest.mark.parametrize("target", ["modules.geojson", "pvscan.gpkg", "report.html"])
def test_full_disk_is_a_one_line_error_naming_the_file(flight, tmp_path, target):
    # the limit lets every file written before `target` through and stops `target`
    before = ORDER[:ORDER.index(target)]
    limit = max([flight["sizes"][n] for n in before], default=0) + 1
    assert limit < flight["sizes"][target], "the reference files are not ordered as this case needs"
    out = tmp_path / "out"
    r = subprocess.run([*PVSCAN, "-q", "inspect", str(flight["manifest"]), "--out", str(out)],
                       capture_output=True, text=True, preexec_fn=_limit_files(limit))
    assert r.returncode == 1, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr
    assert lines[0].startswith(f"pvscan: error: {out / target}: cannot write: ")
    if target == "pvscan.gpkg":
        assert "commit" in lines[0].lower() or "too large" in lines[0].lower()  # GDAL's or the OS's words
    assert not out.exists() and _leftovers(out) == []


def test_killed_run_leaves_a_staging_folder_that_the_next_run_removes(flight, tmp_path):
    out = tmp_path / "out"
    p = subprocess.Popen([*PVSCAN, "inspect", str(flight["manifest"]), "--out", str(out)],
                         stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 300
    while not _leftovers(out) and p.poll() is None and time.monotonic() < deadline:
        time.sleep(0.002)
    assert _leftovers(out), "the run ended before its staging folder was seen"
    os.kill(p.pid, signal.SIGKILL)
    p.wait()
    stale = _leftovers(out)
    assert len(stale) == 1 and ".staging-" in stale[0] and not out.exists()
    r = subprocess.run([*PVSCAN, "-q", "inspect", str(flight["manifest"]), "--out", str(out)],
                       capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    assert _leftovers(out) == []
    assert sorted(q.name for q in out.iterdir()) == sorted(ORDER)


_HOLD = ("import sys, time; from pvscan.io.locking import try_lock; lock = try_lock(sys.argv[1]); "
         "print('held' if lock else 'no', flush=True); time.sleep(600)")


def test_a_living_runs_staging_folder_is_left_alone(flight, tmp_path):
    out = tmp_path / "out"
    live = tmp_path / ".out.staging-live1234"
    live.mkdir()
    (live / "modules.geojson").write_text("{}")
    holder = subprocess.Popen([sys.executable, "-c", _HOLD, str(live)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        r = subprocess.run([*PVSCAN, "-q", "inspect", str(flight["manifest"]), "--out", str(out),
                            "--no-report"], capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
        assert (live / "modules.geojson").exists()  # another run still writes there
    finally:
        holder.kill()
        holder.wait()
        holder.stdout.close()
    assert clean_stale_staging(out) == [live] and not live.exists()  # its owner is gone


def test_previous_results_moved_aside_by_a_killed_run_come_back(tmp_path):
    out = tmp_path / "out"
    aside = tmp_path / ".out.old-0badc0de"
    aside.mkdir()
    (aside / "summary.json").write_text("{}")
    assert clean_stale_staging(out) == [aside]
    assert (out / "summary.json").exists() and not aside.exists()
    # when the new results are in place, the old ones left aside are removed instead
    aside.mkdir()
    clean_stale_staging(out)
    assert not aside.exists() and (out / "summary.json").exists()


def test_write_errors_in_a_staging_folder_name_the_final_file(tmp_path):
    out = tmp_path / "out"
    with pytest.raises(OutputError) as e:
        with staging_dir(out) as stage:
            raise PermissionError(13, "Permission denied", str(stage / "report.html"))
    assert str(e.value) == f"{out / 'report.html'}: cannot write: Permission denied"
    assert not out.exists() and _leftovers(out) == []
    with staging_dir(out) as stage:
        lock = try_lock(stage)
        assert lock is False  # the run holds its own staging folder
