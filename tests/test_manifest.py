"""Flight manifest: keys of the contract, validation, one-line errors naming the key."""
from __future__ import annotations

import textwrap

import pytest

from pvscan.errors import ManifestError
from pvscan.io.manifest import load_flight

MANIFEST = """
[site]
name = "Test field"
specific_yield_kwh_per_kwp = 1150

[flight]
orthos = ["thermal.tif"]
layout = "layout.geojson"
start = "2026-06-14T10:40:00+02:00"
end   = "2026-06-14T11:25:00+02:00"

[ortho]
units = "celsius"
scale = 1.0
offset = 0.0
nodata = -9999
emissivity = 1.0
reflected_c = 20.0

[conditions]
poa_irradiance_w_m2 = 870.0
ambient_c = 26.5
wind_m_s = 2.1
sky_c = -12.0

[module]
pmax_w = 410.0
gamma_pmax_pct_per_k = -0.35
width_m = 1.038
length_m = 2.094
cells_across = 6
cells_along = 12
half_cut = false
bypass_diodes = 3
emissivity = 0.85

[layout]
rows = 2
cols = 24
orientation = "portrait"
gap_m = 0.02
tilt_deg = 25
azimuth_deg = 180
"""


@pytest.fixture
def flight_dir(tmp_path):
    (tmp_path / "thermal.tif").write_bytes(b"")
    (tmp_path / "layout.geojson").write_text('{"type": "FeatureCollection", "features": []}')
    return tmp_path


def write(d, text):
    p = d / "flight.toml"
    p.write_text(textwrap.dedent(text))
    return p


def test_contract_manifest_loads(flight_dir):
    f = load_flight(write(flight_dir, MANIFEST))
    assert f.site.name == "Test field"
    assert f.flight.orthos == ((flight_dir / "thermal.tif").resolve(),)
    assert f.flight.start.utcoffset().total_seconds() == 7200
    assert f.module.n_along == 12 and f.module.n_cells == 72
    # efficiency = pmax / (1000 W/m2 * area): 410 / (1000 * 1.038 * 2.094) = 0.1886
    assert f.module.efficiency == pytest.approx(410 / (1000 * 1.038 * 2.094))
    assert f.conditions.sky_c == -12.0
    assert f.layout.cols == 24
    assert f.module.junction_box == "edge"
    assert f.flight.id == "20260614T0840Z"


def test_half_cut_doubles_cells_and_splits_boxes(flight_dir):
    f = load_flight(write(flight_dir, MANIFEST.replace("half_cut = false", "half_cut = true")))
    assert f.module.n_along == 24
    assert f.module.junction_box == "split"


@pytest.mark.parametrize(
    "old,new,needle",
    [
        ("wind_m_s = 2.1", "wind_ms = 2.1", "unknown key conditions.wind_ms (did you mean wind_m_s?)"),
        ("pmax_w = 410.0", 'pmax_w = "410"', "module.pmax_w"),
        ('layout = "layout.geojson"', 'layout = "missing.geojson"', "flight.layout: file not found"),
        ('units = "celsius"', 'units = "fahrenheit"', "ortho.units"),
        ("poa_irradiance_w_m2 = 870.0\n", "", "missing key conditions.poa_irradiance_w_m2"),
        ('start = "2026-06-14T10:40:00+02:00"', 'start = "2026-06-14T10:40:00"', "flight.start"),
        ('end   = "2026-06-14T11:25:00+02:00"', 'end = "2026-06-14T09:00:00+02:00"', "before flight.start"),
        ("bypass_diodes = 3", "bypass_diodes = 4", "module.bypass_diodes"),
        ("[layout]", "[layot]", "unknown key layot"),
    ],
)
def test_bad_manifest_one_line_error(flight_dir, old, new, needle):
    assert old in MANIFEST
    p = write(flight_dir, MANIFEST.replace(old, new, 1))
    with pytest.raises(ManifestError) as exc:
        load_flight(p)
    msg = str(exc.value)
    assert needle in msg
    assert "\n" not in msg
    assert str(p) in msg


def test_not_toml(flight_dir):
    p = write(flight_dir, "[site\nname=")
    with pytest.raises(ManifestError, match="not valid TOML"):
        load_flight(p)


def test_missing_manifest(tmp_path):
    with pytest.raises(ManifestError, match="not found"):
        load_flight(tmp_path / "nope.toml")
