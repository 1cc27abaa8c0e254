"""Property-based tests (hypothesis) of manifest parsing and of splitting tables into modules.

Manifests: any manifest within the ranges of ``schemas/flight.schema.json`` is written as TOML
(checked against the standard library's TOML 1.0 reader, ``tomllib``) and read back field for
field; any invalid value of any key raises :class:`pvscan.errors.ManifestError` naming the key,
never another exception; arbitrary edits give a flight or a ManifestError, nothing else.

Tables: a table rectangle of any size, rotation, tilt and gap splits into rows x cols module
footprints that tile it less the gaps. The areas are measured by shapely (GEOS), independent of
the splitting code: total area = (L - (cols - 1) g) (W - (rows - 1) g cos(tilt)), no overlaps
(the union's area equals the sum), all inside the table.

Examples are drawn from a fixed seed (``PVSCAN_TEST_SEED``, default fixed) and few, so the
run is deterministic and quick; the example database is off so earlier runs do not change it.
"""
from __future__ import annotations

import math
import tomllib
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
import shapely
from conftest import test_seed
from hypothesis import HealthCheck, assume, given, seed, settings
from hypothesis import strategies as st
from shapely import affinity
from shapely.geometry import box

from pvscan.errors import ManifestError
from pvscan.io.layout.split import split_table
from pvscan.io.manifest import Flight, flight_from_dict, load_flight
from pvscan.io.resources import load_schema
from pvscan.simulate.writers import toml_dumps

SEED = test_seed()
PROPS = settings(max_examples=40, deadline=None, database=None,
                 suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
SCHEMA = load_schema("flight.schema.json")

# ----------------------------------------------------------------------------- manifests
TEXT = st.text(st.characters(categories=("L", "N", "P", "Zs")), min_size=1, max_size=20)


def _num(lo: float, hi: float, *, lo_open: bool = False, hi_open: bool = False):
    return st.floats(lo, hi, exclude_min=lo_open, exclude_max=hi_open, allow_nan=False, allow_infinity=False)


@st.composite
def manifests(draw) -> dict:
    """A valid manifest (a dict as TOML gives it) drawn within the schema's ranges."""
    def maybe(key, strategy, into):  # an optional key, present or absent
        if draw(st.booleans()):
            into[key] = draw(strategy)

    site = {"name": draw(TEXT)}
    maybe("specific_yield_kwh_per_kwp", _num(0, 3500, lo_open=True), site)
    maybe("tariff_per_kwh", _num(0, 10), site)
    maybe("currency", TEXT, site)
    maybe("id", TEXT, site)

    offset_min = draw(st.integers(-12 * 60, 14 * 60))
    tz = timezone(timedelta(minutes=offset_min))
    start = draw(st.datetimes(datetime(2000, 1, 1), datetime(2090, 12, 31))).replace(microsecond=0, tzinfo=tz)
    end = start + timedelta(seconds=draw(st.integers(0, 6 * 3600)))
    flight = {"orthos": draw(st.lists(st.sampled_from(["a.tif", "tiles/b.tif", "c d.tif"]), min_size=1, max_size=3)),
              "layout": draw(st.sampled_from(["layout.geojson", "gis/layout.gpkg", "layout.shp"])),
              "start": start.isoformat(), "end": end.isoformat()}
    maybe("id", TEXT, flight)
    maybe("frames", st.just("frames.geojson"), flight)
    maybe("altitude_m", _num(0, 1000, lo_open=True), flight)

    ortho: dict = {}
    maybe("units", st.sampled_from(["celsius", "kelvin"]), ortho)
    maybe("scale", _num(-100, 100).filter(lambda v: v != 0), ortho)
    maybe("offset", _num(-500, 500), ortho)
    maybe("nodata", st.one_of(_num(-1e6, 1e6), st.integers(-99999, 65535)), ortho)
    maybe("emissivity", _num(0, 1, lo_open=True), ortho)
    maybe("reflected_c", _num(-100, 100), ortho)

    conditions: dict = {}
    if draw(st.booleans()):
        conditions["series"] = "weather.csv"
    else:
        conditions.update(poa_irradiance_w_m2=draw(_num(0, 1500)), ambient_c=draw(_num(-50, 60)),
                          wind_m_s=draw(_num(0, 60)))
    maybe("sky_c", _num(-100, 40), conditions)
    maybe("relative_humidity_pct", _num(0, 100), conditions)

    width = draw(_num(0.1, 5, lo_open=True))
    diodes = draw(st.integers(1, 12))
    module = {"pmax_w": draw(_num(0, 2000, lo_open=True)), "width_m": width,
              "length_m": draw(_num(width, 5)), "cells_across": diodes * draw(st.integers(1, 40 // diodes)),
              "cells_along": draw(st.integers(1, 80)), "bypass_diodes": diodes}
    maybe("model", TEXT, module)
    maybe("gamma_pmax_pct_per_k", _num(-2, 0), module)
    maybe("half_cut", st.booleans(), module)
    maybe("emissivity", _num(0, 1, lo_open=True), module)
    maybe("junction_box", st.sampled_from(["edge", "split"]), module)

    layout: dict = {}
    maybe("rows", st.integers(1, 50), layout)
    maybe("cols", st.integers(1, 500), layout)
    maybe("orientation", st.sampled_from(["portrait", "landscape"]), layout)
    maybe("gap_m", _num(0, 2), layout)
    maybe("tilt_deg", _num(0, 90), layout)
    maybe("azimuth_deg", _num(0, 360), layout)
    data = {"site": site, "flight": flight, "ortho": ortho, "conditions": conditions, "module": module}
    if layout or draw(st.booleans()):
        data["layout"] = layout
    return data


def _write(tmp_path: Path, data: dict) -> Path:
    path = tmp_path / "flight.toml"
    path.write_text(toml_dumps(data), encoding="utf-8")
    return path


def _assert_same(f: Flight, d: dict, root: Path) -> None:
    """Every key of the manifest is in the flight as written (absent optional keys: None or
    the documented default of CONTRACT.md / the dataclasses)."""
    s, fl, o, c, m = d["site"], d["flight"], d["ortho"], d["conditions"], d["module"]
    assert f.site.name == s["name"] and f.site.id == s.get("id", s["name"])
    assert f.site.specific_yield_kwh_per_kwp == s.get("specific_yield_kwh_per_kwp")
    assert f.site.tariff_per_kwh == s.get("tariff_per_kwh") and f.site.currency == s.get("currency")
    start = datetime.fromisoformat(fl["start"])
    assert f.flight.start == start and f.flight.end == datetime.fromisoformat(fl["end"])
    assert f.flight.start.utcoffset() == start.utcoffset()
    assert f.flight.id == fl.get("id", start.astimezone(UTC).strftime("%Y%m%dT%H%MZ"))
    assert f.flight.orthos == tuple(root.resolve() / p for p in fl["orthos"])
    assert f.flight.layout == root.resolve() / fl["layout"]
    assert f.flight.frames == (root.resolve() / fl["frames"] if "frames" in fl else None)
    assert f.flight.altitude_m == fl.get("altitude_m")
    assert f.ortho.units == o.get("units", "celsius")
    assert f.ortho.scale == o.get("scale", 1.0) and f.ortho.offset == o.get("offset", 0.0)
    assert f.ortho.nodata == o.get("nodata")
    assert f.ortho.emissivity == o.get("emissivity", 1.0) and f.ortho.reflected_c == o.get("reflected_c", 20.0)
    for key in ("poa_irradiance_w_m2", "ambient_c", "wind_m_s", "sky_c", "relative_humidity_pct"):
        assert getattr(f.conditions, key) == c.get(key), key
    assert f.conditions.series == (root.resolve() / c["series"] if "series" in c else None)
    for key in ("pmax_w", "width_m", "length_m", "cells_across", "cells_along", "bypass_diodes"):
        assert getattr(f.module, key) == m[key], key
    assert f.module.gamma_pmax_pct_per_k == m.get("gamma_pmax_pct_per_k", -0.35)
    assert f.module.half_cut == m.get("half_cut", False) and f.module.emissivity == m.get("emissivity", 0.85)
    assert f.module.junction_box == m.get("junction_box", "split" if f.module.half_cut else "edge")
    lay = d.get("layout", {})
    assert (f.layout.rows, f.layout.cols) == (lay.get("rows"), lay.get("cols"))
    assert f.layout.orientation == lay.get("orientation", "portrait")
    assert f.layout.gap_m == lay.get("gap_m", 0.02) and f.layout.tilt_deg == lay.get("tilt_deg", 25.0)
    assert f.layout.azimuth_deg == lay.get("azimuth_deg", 180.0)


@seed(SEED)
@PROPS
@given(data=manifests())
def test_valid_manifests_round_trip(tmp_path, data):
    path = _write(tmp_path, data)
    # the TOML written is read back by the standard library as the same document (TOML 1.0)
    assert tomllib.loads(path.read_text(encoding="utf-8")) == data
    f = load_flight(path, check_files=False)
    _assert_same(f, data, tmp_path)


def _keys() -> list[tuple[str, str, dict]]:
    return [(sec, key, spec) for sec, sec_spec in SCHEMA["properties"].items()
            for key, spec in sec_spec["properties"].items()]


_OTHER = st.one_of(st.booleans(), st.lists(st.integers(0, 9), max_size=2),
                   st.dictionaries(st.just("x"), st.integers(0, 9), min_size=1))


def _invalid_values(spec: dict):
    """Values that break ``spec`` (one key of the schema), of wrong type or out of range."""
    kinds = []
    if "enum" in spec:
        kinds += [TEXT.filter(lambda v: v not in spec["enum"]), st.integers(), _OTHER]
    elif spec.get("type") in ("number", "integer"):
        kinds += [TEXT, _OTHER, st.sampled_from([math.nan, math.inf, -math.inf])]
        if "minimum" in spec:
            kinds.append(_num(spec["minimum"] - 1e6, spec["minimum"], hi_open=True))
        if "exclusiveMinimum" in spec:
            kinds.append(_num(spec["exclusiveMinimum"] - 1e6, spec["exclusiveMinimum"]))
        if "maximum" in spec:
            kinds.append(_num(spec["maximum"], spec["maximum"] + 1e6, lo_open=True))
        if spec.get("type") == "integer":
            lo = spec.get("minimum", -1000)
            kinds.append(_num(lo + 0.01, lo + 0.99))  # within range, not whole
        if "not" in spec:
            kinds.append(st.just(spec["not"]["const"]))
    elif spec.get("type") == "string":
        kinds += [st.integers(), _num(-10, 10), _OTHER]
        if spec.get("minLength"):
            kinds.append(st.just(""))
        if spec.get("format") == "date-time":
            kinds.append(st.sampled_from(["yesterday", "2026-06-14", "2026-06-14T10:40:00", "14/06/2026 10:40"]))
    elif spec.get("type") == "array":
        kinds += [st.just([]), st.lists(st.integers(), min_size=1, max_size=2), TEXT, st.booleans()]
    elif spec.get("type") == "boolean":
        kinds += [TEXT, st.integers(0, 1), _num(0, 1)]
    assert kinds, spec
    return st.one_of(kinds)


BASE = {"site": {"name": "Property field (invented)"},
        "flight": {"orthos": ["thermal.tif"], "layout": "layout.geojson", "start": "2026-06-14T10:40:00+02:00",
                   "end": "2026-06-14T11:25:00+02:00"},
        "ortho": {"units": "celsius"},
        "conditions": {"poa_irradiance_w_m2": 870.0, "ambient_c": 26.5, "wind_m_s": 2.1},
        "module": {"pmax_w": 410.0, "width_m": 1.038, "length_m": 2.094, "cells_across": 6, "cells_along": 12,
                   "bypass_diodes": 3},
        "layout": {"rows": 2, "cols": 24}}


@st.composite
def broken_manifests(draw) -> tuple[dict, str]:
    sec, key, spec = draw(st.sampled_from(_keys()))
    data = {s: dict(v) for s, v in BASE.items()}
    values = _invalid_values(spec)
    if (sec, key) == ("ortho", "nodata"):  # NaN is a valid nodata value of float GeoTIFFs
        values = values.filter(lambda v: not (isinstance(v, float) and math.isnan(v)))
    data[sec][key] = draw(values)
    return data, f"{sec}.{key}"


@seed(SEED)
@settings(PROPS, max_examples=150)
@given(case=broken_manifests())
def test_invalid_values_raise_manifest_error_naming_the_key(tmp_path, case):
    data, key = case
    with pytest.raises(ManifestError) as e:
        # the dict itself: TOML cannot carry every broken value (e.g. a nested table as a number)
        flight_from_dict(data, tmp_path / "flight.toml", check_files=False)
    msg = str(e.value)
    assert key in msg and str(tmp_path / "flight.toml") in msg and "\n" not in msg, msg


@pytest.mark.parametrize("sec, key", [(sec, k) for sec, spec in SCHEMA["properties"].items()
                                      for k in spec.get("required", [])])
def test_missing_required_key_is_named(tmp_path, sec, key):
    data = {s: dict(v) for s, v in BASE.items()}
    del data[sec][key]
    with pytest.raises(ManifestError, match=rf"missing key {sec}\.{key}$"):
        load_flight(_write(tmp_path, data), check_files=False)


SCALARS = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True), TEXT,
                    st.lists(TEXT, max_size=2))


@st.composite
def edited_manifests(draw) -> dict:
    """A valid manifest with a few keys added, removed or changed to anything TOML holds."""
    data = {s: dict(v) for s, v in draw(manifests()).items()}
    for _ in range(draw(st.integers(1, 4))):
        sec = draw(st.sampled_from([*data, "extra"]))
        table = data.setdefault(sec, {})
        key = draw(st.one_of(st.sampled_from(sorted(table) or ["name"]), TEXT))
        value = draw(SCALARS)
        if value is None:
            table.pop(key, None)
        else:
            table[key] = value
    return data


@seed(SEED)
@settings(PROPS, max_examples=100)
@given(data=edited_manifests())
def test_any_manifest_gives_a_flight_or_a_manifest_error(tmp_path, data):
    try:
        path = _write(tmp_path, data)
    except (TypeError, ValueError):  # the test's writer cannot hold it (NaN in a list, ...): read the dict
        path = tmp_path / "flight.toml"
        try:
            flight_from_dict(data, path, check_files=False)
        except ManifestError as e:
            assert str(path) in str(e)
        return
    try:
        load_flight(path, check_files=False)
    except ManifestError as e:
        assert str(path) in str(e) and "\n" not in str(e)


# ----------------------------------------------------------------------------- tables
@st.composite
def tables(draw):
    rows = draw(st.integers(1, 4))
    cols = draw(st.integers(1, 30))
    gap = draw(_num(0.0, 0.05))
    tilt = draw(_num(0.0, 60.0))
    width = draw(_num(1.0, 10.0))
    length = draw(_num(1.25 * width, 90.0))
    across = width - (rows - 1) * gap * math.cos(math.radians(tilt))
    assume(length - (cols - 1) * gap > 0.2 * cols and across > 0.2 * rows)  # modules of at least 0.2 m
    angle = draw(_num(-180.0, 180.0))
    cx, cy = draw(_num(300_000.0, 700_000.0)), draw(_num(1_000_000.0, 6_000_000.0))
    poly = affinity.rotate(box(cx - length / 2, cy - width / 2, cx + length / 2, cy + width / 2), angle,
                           origin=(cx, cy))
    return dict(poly=poly, rows=rows, cols=cols, orientation=draw(st.sampled_from(["portrait", "landscape"])),
                gap_m=gap, tilt_deg=tilt, azimuth_deg=draw(_num(0.0, 360.0)), length=length, width=width)


@seed(SEED)
@settings(PROPS, max_examples=60)
@given(t=tables())
def test_table_splits_into_modules_that_tile_it_less_the_gaps(t):
    mods = split_table(t["poly"], t["rows"], t["cols"], t["orientation"], t["gap_m"], t["tilt_deg"],
                       t["azimuth_deg"])
    rows, cols = t["rows"], t["cols"]
    assert len(mods) == rows * cols
    assert sorted((r, c) for r, c, _, _ in mods) == [(r, c) for r in range(1, rows + 1) for c in range(1, cols + 1)]
    geoms = [g for _, _, g, _ in mods]
    gap_across = t["gap_m"] * math.cos(math.radians(t["tilt_deg"]))  # a gap on the slope, seen from above
    expected = (t["length"] - (cols - 1) * t["gap_m"]) * (t["width"] - (rows - 1) * gap_across)
    areas = shapely.area(np.array(geoms, dtype=object))
    # float64 coordinates of ~1e6 m: relative area error ~1e-9 (shapely/GEOS area, shoelace)
    tol = 1e-6 * t["poly"].area
    assert abs(areas.sum() - expected) <= tol
    assert np.allclose(areas, expected / (rows * cols), rtol=1e-6)  # evenly
    union = shapely.union_all(np.array(geoms, dtype=object))
    assert abs(union.area - areas.sum()) <= tol  # no overlaps
    assert abs(t["poly"].area - union.area - (t["poly"].area - expected)) <= tol  # the rest is gaps
    assert t["poly"].buffer(1e-6 * t["length"]).contains(union)  # all inside
    for _, _, g, f in mods:  # the module-local frame spans its footprint
        x0, y0, ux, uy, vx, vy = f[:6]
        assert abs(abs(ux * vy - uy * vx) - g.area) <= 1e-6 * g.area
        c = g.centroid
        assert math.hypot(x0 + (ux + vx) / 2 - c.x, y0 + (uy + vy) / 2 - c.y) <= 1e-6 * t["length"]
