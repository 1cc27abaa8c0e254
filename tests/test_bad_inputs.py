"""A table of bad inputs: each case breaks a small simulated flight in one way and states what
`pvscan` must answer.

Every case runs the command line (in the process through click's runner, or as a real process
where the case needs one: a file-size limit for a full disk, a read-only folder) and checks

* the exit code (1 for bad input: never 3, the code of a bug; 0 only where the flight is still
  usable and the result says what is wrong with it),
* one line ``pvscan: error: ...`` that names the file, key or feature and contains the words of
  the case (warnings may come before it), and no Python traceback,
* nothing in ``--out``: no folder, no half-written file, no hidden ``.out.staging-*`` /
  ``.out.old-*`` folder beside it (previous results given with ``--overwrite`` stay as they were).

The flights are simulated once per session from ``tests/scenarios/`` with the seed of
``PVSCAN_TEST_SEED`` (default fixed) and copied for each case. The full disk is a file-size
limit (RLIMIT_FSIZE with SIGXFSZ ignored: the kernel fails the write with EFBIG where a full
disk fails it with ENOSPC, POSIX setrlimit(2)); the read-only folder is a folder of mode 0555,
and a root user is denied the override of file permissions (Linux capabilities(7):
CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH dropped from the bounding set before exec).
"""
from __future__ import annotations

import ctypes
import filecmp
import json
import math
import os
import resource
import shutil
import signal
import subprocess
import sys
import tomllib
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pytest
import rasterio
from click.testing import CliRunner
from conftest import test_seed
from pyproj import Transformer
from rasterio.transform import Affine

from pvscan.cli.main import cli
from pvscan.pipeline import inspect_flight
from pvscan.simulate.writers import toml_dumps

SEED = test_seed()
SCENARIOS = Path(__file__).parent / "scenarios"
#: The simulated flights every case starts from: a fixed-tilt field with one anomaly of every
#: class (open string and PID included), and tracker rows with a weather series and frames.
BASES = {"fixed": "all_defects_rotated.toml", "series": "trackers_series.toml"}


@dataclass
class Ctx:
    """What a case may use: its own copy of the flight, a scratch folder, the session's flights."""

    flight: Path  # the case's copy of the base flight (flight.toml inside)
    tmp: Path  # scratch folder of the case
    out: Path  # the --out of the case (must not exist afterwards on failure)
    session: dict[str, Path]  # base flights and the reference result (read only)
    argv: list[str] = field(default_factory=list)
    words: list[str] = field(default_factory=list)  # more words the case found (e.g. a feature's id)
    process: Callable[[], None] | None = None  # run as a real process with this preexec_fn


@dataclass(frozen=True)
class Case:
    id: str
    make: Callable[[Ctx], None]  # breaks the flight copy; may set ctx.argv / ctx.process
    code: int  # expected exit code
    words: tuple[str, ...]  # words the message must contain ({out}, {flight}: paths)
    base: str = "fixed"
    check: Callable[[Ctx, Any], None] | None = None  # more checks of a usable result


# ----------------------------------------------------------------------------- helpers
def _manifest(ctx: Ctx) -> dict:
    return tomllib.loads((ctx.flight / "flight.toml").read_text())


def _write_manifest(ctx: Ctx, data: dict) -> None:
    (ctx.flight / "flight.toml").write_text(toml_dumps(data))


def _edit_manifest(ctx: Ctx, edit: Callable[[dict], None]) -> None:
    data = _manifest(ctx)
    edit(data)
    _write_manifest(ctx, data)


def _rewrite_tif(path: Path, edit: Callable[[np.ndarray, dict], tuple[np.ndarray, dict]]) -> None:
    """Rewrite a GeoTIFF with ``edit(array (bands, rows, cols), profile)``."""
    with rasterio.open(path) as ds:
        data, profile = ds.read(), dict(ds.profile)
    data, profile = edit(data, profile)
    profile.update(count=data.shape[0], dtype=data.dtype.name)
    path.unlink()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # NotGeoreferencedWarning when the case drops the CRS
        with rasterio.open(path, "w", **profile) as ds:
            ds.write(data)


def _layout(ctx: Ctx) -> dict:
    return json.loads((ctx.flight / "layout.geojson").read_text())


def _write_layout(ctx: Ctx, doc: dict) -> None:
    (ctx.flight / "layout.geojson").write_text(json.dumps(doc))


def _weather_rows(ctx: Ctx) -> list[str]:
    return (ctx.flight / "weather.csv").read_text().splitlines()


# ----------------------------------------------------------------------------- the breakages
def ortho_truncated(ctx: Ctx) -> None:
    tif = ctx.flight / "thermal.tif"
    tif.write_bytes(tif.read_bytes()[: tif.stat().st_size // 3])  # a copy that stopped a third of the way


def ortho_text(ctx: Ctx) -> None:
    (ctx.flight / "thermal.tif").write_text("time,ambient_c\n2026-06-14T10:40:00+02:00,26.5\n")


def ortho_multiband(ctx: Ctx) -> None:
    _rewrite_tif(ctx.flight / "thermal.tif", lambda a, p: (np.concatenate([a, a, a]), p))


def ortho_no_crs(ctx: Ctx) -> None:
    _rewrite_tif(ctx.flight / "thermal.tif", lambda a, p: (a, {k: v for k, v in p.items() if k != "crs"}))


def ortho_geographic(ctx: Ctx) -> None:
    def edit(a, p):
        # the same raster georeferenced in WGS84 degrees (pixel size: metres / 111,320 m per
        # degree of latitude; WGS84 arc length, from memory)
        t = p["transform"]
        lon, lat = Transformer.from_crs(p["crs"], "EPSG:4326", always_xy=True).transform(t.c, t.f)
        d = t.a / 111_320.0
        return a, {**p, "crs": "EPSG:4326", "transform": Affine(d, 0.0, lon, 0.0, -d, lat)}

    _rewrite_tif(ctx.flight / "thermal.tif", edit)


def layout_point_feature(ctx: Ctx) -> None:
    doc = _layout(ctx)
    f = doc["features"][5]
    ctx.words.append(f["properties"]["module_id"])
    f["geometry"] = {"type": "Point", "coordinates": f["geometry"]["coordinates"][0][0]}
    _write_layout(ctx, doc)


def layout_zero_area_feature(ctx: Ctx) -> None:
    doc = _layout(ctx)
    ctx.words.append(doc["features"][5]["properties"]["module_id"])
    ring = doc["features"][5]["geometry"]["coordinates"][0]
    a, b = ring[0], ring[1]  # every corner on the line through two of them: a polygon of no area
    doc["features"][5]["geometry"]["coordinates"] = [[a, b, [2 * b[0] - a[0], 2 * b[1] - a[1]], a]]
    _write_layout(ctx, doc)


def layout_duplicate_ids(ctx: Ctx) -> None:
    doc = _layout(ctx)
    dup = doc["features"][7]["properties"]["module_id"] = doc["features"][6]["properties"]["module_id"]
    ctx.words.append(f"module_id {dup} appears more than once")
    _write_layout(ctx, doc)


def layout_not_geojson(ctx: Ctx) -> None:
    (ctx.flight / "layout.geojson").write_text('{"type": "FeatureCollection", "features": [')


def layout_shapefile_truncated(ctx: Ctx) -> None:
    """The layout saved as a Shapefile in the ortho's CRS: GDAL cuts ``string_index`` to
    ``string_ind`` (dBASE field names stop at 10 characters; ESRI Shapefile Technical
    Description, 1998)."""
    with rasterio.open(ctx.flight / "thermal.tif") as ds:
        crs = ds.crs
    gdf = gpd.read_file(ctx.flight / "layout.geojson").to_crs(crs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # GDAL says it truncates field names: that is the point
        gdf.to_file(ctx.flight / "layout.shp", engine="pyogrio")
    assert "string_ind" in gpd.read_file(ctx.flight / "layout.shp").columns
    (ctx.flight / "layout.geojson").unlink()
    _edit_manifest(ctx, lambda d: d["flight"].update(layout="layout.shp"))


def layout_without_crs(ctx: Ctx) -> None:
    """A Shapefile whose .prj was not copied along."""
    layout_shapefile_truncated(ctx)
    (ctx.flight / "layout.prj").unlink()


def layout_empty(ctx: Ctx) -> None:
    _write_layout(ctx, {"type": "FeatureCollection", "features": []})


def manifest_not_toml(ctx: Ctx) -> None:
    text = (ctx.flight / "flight.toml").read_text()
    (ctx.flight / "flight.toml").write_text(text.replace("[conditions]", "[conditions", 1))


def manifest_unknown_key(ctx: Ctx) -> None:
    _edit_manifest(ctx, lambda d: d["conditions"].update(ambiant_c=d["conditions"].pop("ambient_c")))


def manifest_wrong_type(ctx: Ctx) -> None:
    _edit_manifest(ctx, lambda d: d["conditions"].update(wind_m_s="2.1 m/s"))


def manifest_missing_key(ctx: Ctx) -> None:
    _edit_manifest(ctx, lambda d: d["module"].pop("pmax_w"))


def manifest_bad_units(ctx: Ctx) -> None:
    _edit_manifest(ctx, lambda d: d["ortho"].update(units="fahrenheit"))


def manifest_missing_ortho(ctx: Ctx) -> None:
    (ctx.flight / "thermal.tif").unlink()


def weather_series_stops_early(ctx: Ctx) -> None:
    """The logger's clock an hour behind (local time written as UTC+1): the series ends long
    before the flight."""
    rows = _weather_rows(ctx)
    shifted = [rows[0]] + [r.replace("T15:", "T14:", 1) for r in rows[1:]]
    (ctx.flight / "weather.csv").write_text("\n".join(shifted) + "\n")


def weather_column_empty(ctx: Ctx) -> None:
    rows = [r.split(",") for r in _weather_rows(ctx)]
    col = rows[0].index("ambient_c")
    for r in rows[1:]:
        r[col] = ""
    (ctx.flight / "weather.csv").write_text("\n".join(",".join(r) for r in rows) + "\n")


def weather_cell_not_a_number(ctx: Ctx) -> None:
    rows = [r.split(",") for r in _weather_rows(ctx)]
    rows[3][rows[0].index("wind_m_s")] = "n/a"
    (ctx.flight / "weather.csv").write_text("\n".join(",".join(r) for r in rows) + "\n")


def _file_size_limit(limit_bytes: int) -> Callable[[], None]:
    def pre() -> None:
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))

    return pre


def _no_permission_override() -> None:
    """Make the child obey file permissions even as root (Linux: prctl PR_CAPBSET_DROP = 24
    of CAP_DAC_OVERRIDE = 1 and CAP_DAC_READ_SEARCH = 2; capabilities(7))."""
    if os.geteuid() != 0:
        return
    libc = ctypes.CDLL(None, use_errno=True)
    for cap in (1, 2):
        if libc.prctl(24, cap, 0, 0, 0) != 0:
            raise OSError(ctypes.get_errno(), "prctl(PR_CAPBSET_DROP)")


def disk_full(ctx: Ctx) -> None:
    ctx.process = _file_size_limit(4096)  # every result file is larger: the first write fails


def out_parent_read_only(ctx: Ctx) -> None:
    parent = ctx.tmp / "locked"
    parent.mkdir()
    ctx.out = parent / "out"
    parent.chmod(0o555)
    ctx.process = _no_permission_override


def overwrite_keeps_previous(ctx: Ctx) -> None:
    shutil.copytree(ctx.session["reference"], ctx.out)
    ortho_text(ctx)
    ctx.argv = ["inspect", str(ctx.flight / "flight.toml"), "--out", str(ctx.out), "--overwrite"]


def evaluate_other_truth(ctx: Ctx) -> None:
    ctx.argv = ["evaluate", str(ctx.session["series"]), str(ctx.session["reference"]), "--json", str(ctx.out)]


def evaluate_other_truth_forced(ctx: Ctx) -> None:
    evaluate_other_truth(ctx)
    ctx.argv.append("--force")


# ----------------------------------------------------------------------------- checks of usable results
# the ortho's values against the flight's conditions, and its coverage of the layout
def _values(ctx: Ctx, fn: Callable[[np.ndarray], np.ndarray]) -> None:
    """Rewrite the ortho's temperatures (nodata pixels stay nodata)."""
    def edit(a, p):
        return np.where(a == p["nodata"], a, fn(a)).astype(a.dtype), p

    _rewrite_tif(ctx.flight / "thermal.tif", edit)


def ortho_kelvin_said_celsius(ctx: Ctx) -> None:
    _values(ctx, lambda a: a + 273.15)  # kelvin = degC + 273.15 (SI Brochure, 9th ed., 2019)


def ortho_celsius_said_kelvin(ctx: Ctx) -> None:
    _edit_manifest(ctx, lambda d: d["ortho"].update(units="kelvin"))


def ortho_fahrenheit_said_celsius(ctx: Ctx) -> None:
    _values(ctx, lambda a: a * 1.8 + 32.0)  # degF = 1.8 degC + 32 (NIST SP 811, 2008)


def ortho_raw_counts_scale_1(ctx: Ctx) -> None:
    """Raw uint16 counts of 0.01 K (common practice for radiometric exports), read with scale 1."""
    def edit(a, p):
        counts = np.clip(np.round((a + 273.15) * 100.0), 1, 65535).astype("uint16")
        counts[a == p["nodata"]] = 0
        return counts, {**p, "nodata": 0}

    _rewrite_tif(ctx.flight / "thermal.tif", edit)
    _edit_manifest(ctx, lambda d: d["ortho"].update(scale=1.0, offset=0.0, nodata=0))


def ortho_all_nodata(ctx: Ctx) -> None:
    _rewrite_tif(ctx.flight / "thermal.tif", lambda a, p: (np.full_like(a, p["nodata"]), p))


def layout_10_km_away(ctx: Ctx) -> None:
    doc = _layout(ctx)
    lat = doc["features"][0]["geometry"]["coordinates"][0][0][1]
    dlon = 10_000.0 / (111_320.0 * math.cos(math.radians(lat)))  # metres per degree of longitude, from memory
    for f in doc["features"]:
        f["geometry"]["coordinates"] = [[[x + dlon, y] for x, y in ring] for ring in f["geometry"]["coordinates"]]
    _write_layout(ctx, doc)


def layout_half_outside(ctx: Ctx) -> None:
    """The ortho cut to its eastern half: the western modules were not imaged."""
    def edit(a, p):
        w = a.shape[2] // 2
        shifted = p["transform"] * Affine.translation(w, 0)
        return a[:, :, w:].copy(), {**p, "width": a.shape[2] - w, "transform": shifted}

    _rewrite_tif(ctx.flight / "thermal.tif", edit)


def coverage_failed(ctx: Ctx, out: Path) -> None:
    v = json.loads((out / "summary.json").read_text())["validity"]
    assert v["ok"] is False and "coverage" in v["failed"], v
    mods = json.loads((out / "modules.geojson").read_text())["features"]
    no_data = sum(1 for m in mods if m["properties"]["t_median_c"] is None)
    assert 0.25 * len(mods) <= no_data <= 0.75 * len(mods)  # about half the field was cut away


def _anomalies(result: Path) -> list[tuple[str, str]]:
    doc = json.loads((result / "anomalies.geojson").read_text())
    return sorted((f["properties"]["module_id"], f["properties"]["defect"]) for f in doc["features"])


def same_findings_as_reference(ctx: Ctx, out: Path) -> None:
    ref = ctx.session["reference"]
    assert _anomalies(out) == _anomalies(ref)  # open strings and PID included: the stringing was read
    mods = json.loads((out / "modules.geojson").read_text())["features"]
    assert all(m["properties"]["string_index"] is not None for m in mods)


def forced_scores_written(ctx: Ctx, out: Path) -> None:
    assert json.loads(out.read_text())["flight_check"]["forced"] is True


# ----------------------------------------------------------------------------- the table
CASES = [
    # the ortho
    Case("ortho_truncated", ortho_truncated, 1, ("{flight}/thermal.tif", "cannot read")),
    Case("ortho_text_as_tiff", ortho_text, 1, ("{flight}/thermal.tif", "not a readable raster")),
    Case("ortho_multiband", ortho_multiband, 1, ("{flight}/thermal.tif", "3 bands", "single-band")),
    Case("ortho_no_crs", ortho_no_crs, 1, ("{flight}/thermal.tif", "no CRS")),
    Case("ortho_geographic_crs", ortho_geographic, 1, ("{flight}/thermal.tif", "EPSG:4326", "not projected")),
    Case("ortho_missing", manifest_missing_ortho, 1, ("flight.orthos[0]", "file not found")),
    # the ortho's values and coverage
    Case("ortho_kelvin_said_celsius", ortho_kelvin_said_celsius, 1,
         ("thermal.tif", "look like kelvin", 'units = "kelvin"')),
    Case("ortho_celsius_said_kelvin", ortho_celsius_said_kelvin, 1, ("thermal.tif", "look like degrees Celsius")),
    Case("ortho_fahrenheit_said_celsius", ortho_fahrenheit_said_celsius, 1, ("thermal.tif", "Fahrenheit")),
    Case("ortho_raw_counts_scale_1", ortho_raw_counts_scale_1, 1, ("thermal.tif", "raw sensor counts", "scale")),
    Case("ortho_all_nodata", ortho_all_nodata, 1, ("no usable pixel",)),
    Case("layout_10_km_from_the_ortho", layout_10_km_away, 1, ("no module of the layout lies on the ortho",)),
    Case("layout_half_outside_the_ortho", layout_half_outside, 0, (), check=coverage_failed),
    # the layout
    Case("layout_point_feature", layout_point_feature, 1, ("{flight}/layout.geojson", "Point is not a polygon")),
    Case("layout_zero_area_feature", layout_zero_area_feature, 1, ("{flight}/layout.geojson", "zero area")),
    Case("layout_duplicate_module_ids", layout_duplicate_ids, 1,
         ("{flight}/layout.geojson",)),
    Case("layout_not_geojson", layout_not_geojson, 1, ("{flight}/layout.geojson", "cannot read the layout")),
    Case("layout_without_crs", layout_without_crs, 1, ("{flight}/layout.shp", "no coordinate reference system")),
    Case("layout_without_features", layout_empty, 1, ("{flight}/layout.geojson", "no features")),
    Case("layout_shapefile_truncated_fields", layout_shapefile_truncated, 0, (),
         check=same_findings_as_reference),
    # the manifest
    Case("manifest_not_toml", manifest_not_toml, 1, ("{flight}/flight.toml",)),
    Case("manifest_unknown_key", manifest_unknown_key, 1,
         ("{flight}/flight.toml", "conditions.ambiant_c", "did you mean ambient_c")),
    Case("manifest_wrong_type", manifest_wrong_type, 1, ("{flight}/flight.toml", "wind_m_s", "2.1 m/s")),
    Case("manifest_missing_key", manifest_missing_key, 1, ("{flight}/flight.toml", "pmax_w")),
    Case("manifest_unknown_units", manifest_bad_units, 1, ("{flight}/flight.toml", "ortho.units", "fahrenheit")),
    # the weather series
    Case("weather_series_stops_early", weather_series_stops_early, 1, ("{flight}/weather.csv", "covers"),
         base="series"),
    Case("weather_column_without_values", weather_column_empty, 1,
         ("{flight}/weather.csv", "ambient_c", "no values"), base="series"),
    Case("weather_cell_not_a_number", weather_cell_not_a_number, 1,
         ("{flight}/weather.csv", "wind_m_s", "row 3", "n/a"), base="series"),
    # the machine
    Case("disk_full", disk_full, 1, ("{out}/", "cannot write")),
    Case("out_parent_read_only", out_parent_read_only, 1, ("{out}", "Permission denied")),
    Case("overwrite_keeps_previous_results", overwrite_keeps_previous, 1, ("{flight}/thermal.tif",)),
    # another flight's truth
    Case("evaluate_other_flights_truth", evaluate_other_truth, 1,
         ("different flights", "site", "flight id", "start time", "--force")),
    Case("evaluate_other_flights_truth_forced", evaluate_other_truth_forced, 0, ("different flights",),
         check=forced_scores_written),
]


# ----------------------------------------------------------------------------- running
@pytest.fixture(scope="session")
def session_flights(tmp_path_factory) -> dict[str, Path]:
    """The base flights (``pvscan simulate``, once per session) and a reference result."""
    root = tmp_path_factory.mktemp("bad_inputs")
    flights = {}
    for name, scenario in BASES.items():
        r = CliRunner().invoke(cli, ["-q", "simulate", str(SCENARIOS / scenario), "--out", str(root / name),
                                     "--seed", str(SEED)])
        assert r.exit_code == 0, r.output
        flights[name] = root / name
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # validity or registration notes of a random flight
        inspect_flight(flights["fixed"] / "flight.toml", out_dir=root / "reference", report=False)
    flights["reference"] = root / "reference"
    return flights


def _run(ctx: Ctx) -> tuple[int, str, str]:
    argv = ["-q", *ctx.argv]
    if ctx.process is None:
        with warnings.catch_warnings():
            warnings.simplefilter("default")  # as on the command line: warnings are shown, not raised
            r = CliRunner().invoke(cli, argv)
        assert r.exception is None or isinstance(r.exception, SystemExit), repr(r.exception)
        return r.exit_code, r.stdout, r.stderr
    p = subprocess.run([sys.executable, "-m", "pvscan.cli.main", *argv], capture_output=True, text=True,
                       preexec_fn=ctx.process, check=False)
    return p.returncode, p.stdout, p.stderr


def _leftovers(out: Path) -> list[str]:
    return sorted(p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}."))


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(case: Case, session_flights, tmp_path):
    flight = tmp_path / "flight"
    shutil.copytree(session_flights[case.base], flight)
    ctx = Ctx(flight=flight, tmp=tmp_path, out=tmp_path / "out", session=session_flights)
    case.make(ctx)
    ctx.argv = ctx.argv or ["inspect", str(flight / "flight.toml"), "--out", str(ctx.out)]
    previous = ctx.out if ctx.out.is_dir() else None
    if previous is not None:
        kept = tmp_path / "previous"
        shutil.copytree(previous, kept)
    try:
        code, stdout, stderr = _run(ctx)
    finally:
        ctx.out.parent.chmod(0o755)
    words = [w.format(out=ctx.out, flight=flight) for w in case.words] + ctx.words
    assert "Traceback" not in stdout + stderr
    assert code == case.code, f"exit {code}: {stderr}"
    assert _leftovers(ctx.out) == [], "a staging folder or moved-aside result was left behind"
    if case.code == 0:
        text = stdout + stderr
        assert all(w in text for w in words), (words, text)
        case.check(ctx, ctx.out)
        return
    lines = [ln for ln in stderr.strip().splitlines() if not ln.startswith("pvscan: warning:")]
    assert len(lines) == 1 and lines[0].startswith("pvscan: error: "), stderr
    assert all(w in lines[0] for w in words), (words, lines[0])
    if previous is None:
        assert not ctx.out.exists(), sorted(p.name for p in ctx.out.iterdir()) if ctx.out.is_dir() else ctx.out
    else:  # the previous results are left as they were
        cmp = filecmp.dircmp(kept, ctx.out)
        assert not (cmp.left_only or cmp.right_only or cmp.diff_files), cmp.report()
