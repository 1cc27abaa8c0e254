"""Weather series, per-module conditions and acquisition validity.

External references named beside each check: IEC TS 62446-3 acquisition limits (600 W/m2;
28 km/h wind, from memory), the Beaufort scale (WMO; 4 Bft = 5.5-7.9 m/s, from memory),
hand-computed linear interpolation and time-weighted means, published sky formulae via
pvscan.physics.radiometry (checked in test_radiometry.py).
"""
from __future__ import annotations

import json
import math
import warnings
from datetime import UTC, datetime, timedelta, timezone
from types import SimpleNamespace as NS

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely

from pvscan.errors import ConditionsError, ValidityWarning
from pvscan.io.settings import load_pipeline
from pvscan.measure import conditions as cond
from pvscan.physics import radiometry

CRS = "EPSG:32633"
START = datetime(2026, 6, 14, 10, 40, tzinfo=timezone(timedelta(hours=2)))
END = datetime(2026, 6, 14, 11, 20, tzinfo=timezone(timedelta(hours=2)))
SETTINGS = load_pipeline()["conditions"]
LOUD = {**SETTINGS, "warn": True}


def write_csv(path, rows, header="time,poa_irradiance_w_m2,ambient_c,wind_m_s"):
    path.write_text(header + "\n" + "\n".join(rows) + "\n", encoding="utf-8")
    return path


def ramp_rows(start=START - timedelta(minutes=5), minutes=50, step_min=5, g0=800.0, g_per_min=2.0):
    rows = []
    for k in range(0, minutes + 1, step_min):
        t = start + timedelta(minutes=k)
        rows.append(f"{t.isoformat()},{g0 + g_per_min * k:.3f},{25 + 0.1 * k:.3f},{2.0 + 0.02 * k:.3f}")
    return rows


def spec(**kw):
    base = dict(poa_irradiance_w_m2=None, ambient_c=None, wind_m_s=None, sky_c=None,
                relative_humidity_pct=None, series=None)
    base.update(kw)
    return NS(**base)


# ----------------------------------------------------------------------------- reading
def test_read_weather_series_sorted_utc(tmp_path):
    rows = ramp_rows()
    rows = rows[3:] + rows[:3]  # out of order
    rows[0] = rows[0].replace("+02:00", "+02:00")
    # one row written in UTC with Z: same instant, other notation
    t = (START - timedelta(minutes=5)).astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    rows[-3] = t + rows[-3][rows[-3].index(","):]
    p = write_csv(tmp_path / "w.csv", rows)
    df = cond.read_weather_series(p)
    assert str(df.index.tz) == "UTC" and df.index.is_monotonic_increasing
    assert df.index[0] == pd.Timestamp("2026-06-14T08:35:00Z")
    assert df["poa_irradiance_w_m2"].iloc[0] == pytest.approx(800.0)
    assert df.attrs["source"] == str(p)


@pytest.mark.parametrize(
    "mutate, match",
    [
        (lambda rows: rows, "missing column 'wind_m_s'"),
        (lambda rows: [rows[0].replace("+02:00", "")] + rows[1:], r"row 1 \(line 2\).*no UTC offset"),
        (lambda rows: rows[:2] + [rows[2].replace(",820.000,", ",8o0,")] + rows[3:],
         r"poa_irradiance_w_m2', row 3.*not a number"),
        (lambda rows: rows + [rows[1]], "rows 2 and 12 have the same time"),
        (lambda rows: [rows[0].replace("2026-06-14T", "14.06.2026 ")] + rows[1:], "not ISO 8601"),
        (lambda rows: rows[:1] + [rows[1].replace(",2.100", ",-3")] + rows[2:], r"wind_m_s', row 2.*outside"),
    ],
)
def test_read_weather_series_errors(tmp_path, mutate, match):
    rows = ramp_rows()
    header = "time,poa_irradiance_w_m2,ambient_c,wind_m_s"
    if "wind_m_s" in match and "missing" in match:
        rows = [",".join(r.split(",")[:3]) for r in rows]
        header = "time,poa_irradiance_w_m2,ambient_c"
    p = write_csv(tmp_path / "w.csv", mutate(rows), header)
    with pytest.raises(ConditionsError, match=match) as info:
        cond.read_weather_series(p)
    assert str(p) in str(info.value) and "\n" not in str(info.value)


def test_read_weather_series_missing_file(tmp_path):
    with pytest.raises(ConditionsError, match="not found"):
        cond.read_weather_series(tmp_path / "nope.csv")


def test_gaps_are_interpolated(tmp_path):
    rows = ramp_rows()
    parts = rows[4].split(",")
    parts[1] = ""
    rows[4] = ",".join(parts)
    df = cond.read_weather_series(write_csv(tmp_path / "w.csv", rows))
    assert np.isnan(df["poa_irradiance_w_m2"].iloc[4])
    fc = cond.flight_conditions(spec(), START, END, df, settings=SETTINGS)
    # the ramp is linear, so a gap changes nothing: mean over 10:40..11:20 of 800 + 2 (k)
    # with k = 5..45 min is 800 + 2 * 25 = 850 W/m2 (hand value)
    assert fc.poa_global == pytest.approx(850.0, abs=1e-9)


# ----------------------------------------------------------------------------- flight conditions
def test_flight_conditions_from_series(tmp_path):
    df = cond.read_weather_series(write_csv(tmp_path / "w.csv", ramp_rows()))
    fc = cond.flight_conditions(spec(), START, END, df, settings=SETTINGS)
    # hand values for the linear ramps over k = 5..45 min after the first sample
    assert fc.poa_global == pytest.approx(850.0)
    assert fc.poa_global_min == pytest.approx(810.0) and fc.poa_global_max == pytest.approx(890.0)
    assert fc.poa_global_change_pct == pytest.approx(100 * 80 / 850)
    assert fc.temp_air == pytest.approx(27.5)
    assert fc.wind_speed == pytest.approx(2.5) and fc.wind_speed_max == pytest.approx(2.9)
    assert fc.source == "series" and fc.sky_source == "model" and fc.n_samples == 7
    assert fc.duration_s == pytest.approx(2400.0)
    assert fc.temp_sky == pytest.approx(radiometry.sky_temperature(27.5))
    d = fc.to_dict()
    json.dumps(d)
    assert d["start"] == "2026-06-14T08:40:00+00:00"


def test_series_coverage(tmp_path):
    rows = ramp_rows(minutes=40)  # ends 11:15, flight ends 11:20
    df = cond.read_weather_series(write_csv(tmp_path / "w.csv", rows))
    with pytest.raises(ConditionsError, match=r"w\.csv: series covers .*tolerance 60 s"):
        cond.flight_conditions(spec(), START, END, df, settings={**SETTINGS, "series_tolerance_s": 60.0})
    fc = cond.flight_conditions(spec(), START, END, df, settings={**SETTINGS, "series_tolerance_s": 300.0})
    assert fc.poa_global_max == pytest.approx(880.0)  # held at the last sample


def test_flight_conditions_constants_and_sky():
    s = spec(poa_irradiance_w_m2=870.0, ambient_c=26.5, wind_m_s=2.1, relative_humidity_pct=40.0)
    fc = cond.flight_conditions(s, START, END, settings=SETTINGS)
    assert (fc.poa_global, fc.poa_global_std, fc.wind_speed_max) == (870.0, 0.0, 2.1)
    assert fc.temp_sky == pytest.approx(radiometry.sky_temperature(26.5, 40.0))
    fc2 = cond.flight_conditions(spec(poa_irradiance_w_m2=870.0, ambient_c=26.5, wind_m_s=2.1, sky_c=-12.0),
                                 START, END, settings=SETTINGS)
    assert fc2.temp_sky == -12.0 and fc2.sky_source == "constants"
    with pytest.raises(ConditionsError, match="conditions.wind_m_s"):
        cond.flight_conditions(spec(poa_irradiance_w_m2=870.0, ambient_c=26.5), START, END, settings=SETTINGS)
    with pytest.raises(ConditionsError, match="before flight.start"):
        cond.flight_conditions(s, END, START, settings=SETTINGS)
    with pytest.raises(ConditionsError, match="no UTC offset"):
        cond.flight_conditions(s, START.replace(tzinfo=None), END, settings=SETTINGS)


# ----------------------------------------------------------------------------- per-module
def make_modules(centres, width_m=1.0, length_m=2.0):
    rows = []
    for x, y in centres:
        fx0, fy0 = x - length_m / 2, y - width_m / 2
        rows.append(dict(module_id=f"M{len(rows)}", fx0=fx0, fy0=fy0, fux=length_m, fuy=0.0, fvx=0.0, fvy=width_m,
                         geometry=shapely.box(fx0, fy0, fx0 + length_m, fy0 + width_m)))
    return gpd.GeoDataFrame(rows, geometry="geometry", crs=CRS)


def make_frames(boxes_times):
    return gpd.GeoDataFrame(
        {"frame_id": [f"F{i}" for i in range(len(boxes_times))],
         "time": pd.DatetimeIndex([t for _, t in boxes_times]).tz_convert("UTC")},
        geometry=[shapely.box(*b) for b, _ in boxes_times], crs=CRS)


def test_frame_assignment_most_nadir(tmp_path):
    x0, y0 = 500_000.0, 4_000_000.0
    t = [START + timedelta(minutes=m) for m in (5, 10, 30)]
    frames = make_frames([
        ((x0, y0, x0 + 40, y0 + 30), t[0]),       # centre x0+20
        ((x0 + 25, y0, x0 + 65, y0 + 30), t[1]),  # centre x0+45
        ((x0 + 200, y0, x0 + 240, y0 + 30), t[2]),
    ])
    frames["cx"] = frames.geometry.centroid.x
    frames["cy"] = frames.geometry.centroid.y
    # module A at x0+30: in F0 (10 m from its centre) and F1 (15 m) -> F0
    # module B at x0+36: in F0 (16 m) and F1 (9 m) -> F1
    # module C at x0+120: in no frame -> nearest frame (F1, 55 m away from its edge; F2 80 m)
    mods = make_modules([(x0 + 30, y0 + 15), (x0 + 36, y0 + 15), (x0 + 120, y0 + 15)])
    fr = cond.assign_frames(mods, frames)
    assert fr["frame_id"].tolist() == ["F0", "F1", "F1"]
    assert fr["time_source"].tolist() == ["frame", "frame", "nearest_frame"]

    df = cond.read_weather_series(write_csv(tmp_path / "w.csv", ramp_rows()))
    mc = cond.module_conditions(mods, spec(), START, END, series=df, frames=frames, settings=SETTINGS)
    assert list(mc.index) == list(mods.index)
    # linear interpolation, hand values: the series starts 5 min before the flight,
    # G = 800 + 2 * minutes since then
    assert mc["poa_global"].tolist() == pytest.approx([800 + 2 * 10, 800 + 2 * 15, 800 + 2 * 15])
    assert mc["temp_air"].iloc[0] == pytest.approx(25 + 0.1 * 10)
    assert mc["time"].iloc[1] == pd.Timestamp(t[1])
    assert mc["temp_sky"].tolist() == pytest.approx(
        list(radiometry.sky_temperature(mc["temp_air"].to_numpy())))


def test_module_conditions_without_frames_take_flight_mean(tmp_path):
    mods = make_modules([(500_000.0, 4_000_000.0), (500_010.0, 4_000_000.0)])
    df = cond.read_weather_series(write_csv(tmp_path / "w.csv", ramp_rows()))
    mc = cond.module_conditions(mods, spec(sky_c=-20.0), START, END, series=df, settings=SETTINGS)
    assert mc["poa_global"].tolist() == pytest.approx([850.0, 850.0])
    assert mc["temp_sky"].tolist() == [-20.0, -20.0]
    assert mc["time"].iloc[0] == pd.Timestamp("2026-06-14T09:00:00Z")  # mid flight
    assert set(mc["time_source"]) == {"flight_mean"}
    assert mc["relative_humidity"].isna().all()


def test_read_frames_geojson_lonlat(tmp_path):
    # Frames written as RFC 7946 lon/lat, read into the projected CRS.
    x0, y0 = 500_000.0, 4_000_000.0
    boxes = gpd.GeoSeries([shapely.box(x0, y0, x0 + 40, y0 + 30), shapely.box(x0 + 30, y0, x0 + 70, y0 + 30)],
                          crs=CRS).to_crs("EPSG:4326")
    feats = [{"type": "Feature", "properties": {"frame_id": fid, "time": tt},
              "geometry": shapely.geometry.mapping(g)}
             for fid, tt, g in zip(["a", "b"], ["2026-06-14T10:41:00+02:00", "2026-06-14T08:42:30Z"], boxes)]
    p = tmp_path / "frames.geojson"
    p.write_text(json.dumps({"type": "FeatureCollection", "features": feats}), encoding="utf-8")
    fr = cond.read_frames(p, CRS)
    assert fr.crs.to_epsg() == 32633
    assert fr["frame_id"].tolist() == ["a", "b"]
    assert fr["time"].tolist() == [pd.Timestamp("2026-06-14T08:41:00Z"), pd.Timestamp("2026-06-14T08:42:30Z")]
    assert fr["cx"].iloc[0] == pytest.approx(x0 + 20, abs=0.01)  # pyproj round trip, cm
    feats[1]["properties"]["time"] = "2026-06-14T08:42:30"
    p.write_text(json.dumps({"type": "FeatureCollection", "features": feats}), encoding="utf-8")
    with pytest.raises(ConditionsError, match=r"frame b \(feature 1\).*no UTC offset"):
        cond.read_frames(p, CRS)
    for f in feats:
        del f["properties"]["time"]
    p.write_text(json.dumps({"type": "FeatureCollection", "features": feats}), encoding="utf-8")
    with pytest.raises(ConditionsError, match="no 'time' property"):
        cond.read_frames(p, CRS)


# ----------------------------------------------------------------------------- validity
MODULE = NS(width_m=1.134, length_m=2.279, n_across=6, n_along=24)  # half-cut 182 mm cells


def fc_const(g=870.0, wind=2.1, **kw):
    s = spec(poa_irradiance_w_m2=g, ambient_c=26.0, wind_m_s=wind, sky_c=-20.0)
    return cond.flight_conditions(s, START, END, settings=SETTINGS)


def test_default_limits_and_sources():
    # IEC TS 62446-3: at least 600 W/m2 in the module plane; wind at most 28 km/h, which is
    # inside Beaufort 4 (5.5-7.9 m/s, WMO scale; from memory).
    assert SETTINGS["min_irradiance_w_m2"] == 600.0
    assert SETTINGS["max_wind_m_s"] == pytest.approx(28 / 3.6, abs=0.05)
    assert 5.5 <= SETTINGS["max_wind_m_s"] <= 7.9


def test_validity_passes():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        v = cond.check_validity(fc_const(), gsd_m=0.03, module_spec=MODULE, settings=SETTINGS)
    assert v.ok and v.failed == [] and v.confidence_factor == 1.0
    by = {c["name"]: c for c in v.checks}
    # cell edge: min(1.134 / 6, 2.279 / 24) = 0.09496 m -> 3.17 px at 3 cm/px
    assert by["pixels_per_cell"]["value"] == pytest.approx(2.279 / 24 / 0.03)
    assert by["cloud_cover"]["passed"] is None  # unknown, not counted
    assert by["irradiance_min"]["source"] == "IEC TS 62446-3"
    json.dumps(v.to_dict())


def test_validity_fails_and_lowers_confidence():
    with pytest.warns(ValidityWarning, match="irradiance_min"):
        v = cond.check_validity(fc_const(g=510.0), gsd_m=0.03, module_spec=MODULE, settings=LOUD)
    assert v.failed == ["irradiance_min"] and not v.ok
    assert v.confidence_factor == pytest.approx(510 / 600)
    with pytest.warns(ValidityWarning):
        v = cond.check_validity(fc_const(g=510.0, wind=10.0), gsd_m=0.05, module_spec=MODULE,
                                cloud_okta=5, settings=LOUD)
    assert set(v.failed) == {"irradiance_min", "wind_max", "pixels_per_cell", "cloud_cover"}
    expect = (510 / 600) * (7.8 / 10.0) * ((2.279 / 24 / 0.05) / 3.0) * (2 / 5)
    assert v.confidence_factor == pytest.approx(max(expect, SETTINGS["confidence_floor"]))
    assert v.confidence_factor == SETTINGS["confidence_floor"]  # the product falls below the floor
    with warnings.catch_warnings():  # the default pipeline records, it does not warn
        warnings.simplefilter("error")
        v = cond.check_validity(fc_const(g=510.0), settings=SETTINGS)
    assert v.failed == ["irradiance_min"]


def test_validity_unstable_irradiance_and_module_minimum(tmp_path):
    rows = ramp_rows(g_per_min=4.0)  # 820..980 W/m2 over the flight: 17.8 % change
    df = cond.read_weather_series(write_csv(tmp_path / "w.csv", rows))
    fc = cond.flight_conditions(spec(), START, END, df, settings=SETTINGS)
    mods = make_modules([(500_000.0, 4_000_000.0)])
    mc = cond.module_conditions(mods, spec(), START, END, series=df, settings=SETTINGS)
    mc.loc[0, "poa_global"] = 590.0  # a module imaged under a passing cloud
    with pytest.warns(ValidityWarning):
        v = cond.check_validity(fc, mc, settings=LOUD)
    assert set(v.failed) == {"irradiance_change", "irradiance_min"}
    by = {c["name"]: c for c in v.checks}
    assert by["irradiance_change"]["value"] == pytest.approx(100 * 160 / 900)
    assert by["irradiance_min"]["value"] == 590.0
    assert math.isclose(by["wind_max"]["value"], 2.0 + 0.02 * 45)


def test_specular_sky_view_uses_twice_the_tilt():
    mods = make_modules([(500_000.0, 4_000_000.0)])
    s = spec(poa_irradiance_w_m2=870.0, ambient_c=26.0, wind_m_s=2.0, relative_humidity_pct=45.0)
    hemi = cond.module_conditions(mods, s, START, END, settings=SETTINGS, tilt_deg=10.0)
    spec_view = cond.module_conditions(mods, s, START, END, settings={**SETTINGS, "sky_view": "specular"},
                                       tilt_deg=10.0)
    assert hemi["temp_sky"].iloc[0] == pytest.approx(radiometry.sky_temperature(26.0, 45.0))
    assert spec_view["temp_sky"].iloc[0] == pytest.approx(radiometry.sky_temperature(26.0, 45.0, zenith_deg=20.0))
    # a flat module mirrors the steep, colder part of the sky
    assert spec_view["temp_sky"].iloc[0] < hemi["temp_sky"].iloc[0]


def test_weather_columns_follow_schema():
    # The plausibility ranges and required columns come from schemas/weather.schema.json.
    from pvscan.io.resources import load_schema

    schema = load_schema("weather.schema.json")
    assert set(schema["required"]) == {"time"} | {c for c, v in cond.WEATHER_COLUMNS.items() if v[1]}
    assert cond.WEATHER_COLUMNS["relative_humidity_pct"][2] == (0.0, 100.0)


def test_sky_model_per_module_where_humidity_known(tmp_path):
    rows = ramp_rows()
    rows = [r + (",40" if i % 2 == 0 else ",") for i, r in enumerate(rows)]
    p = write_csv(tmp_path / "w.csv", rows, "time,poa_irradiance_w_m2,ambient_c,wind_m_s,relative_humidity_pct")
    df = cond.read_weather_series(p)
    x0, y0 = 500_000.0, 4_000_000.0
    frames = make_frames([((x0, y0, x0 + 40, y0 + 30), START + timedelta(minutes=5))])
    mods = make_modules([(x0 + 20, y0 + 15)])
    mc = cond.module_conditions(mods, spec(), START, END, series=df, frames=frames, settings=SETTINGS)
    assert mc["relative_humidity"].iloc[0] == pytest.approx(40.0)  # gaps interpolated over
    assert mc["temp_sky"].iloc[0] == pytest.approx(radiometry.sky_temperature(mc["temp_air"].iloc[0], 40.0))


def test_conditions_for_flight(tmp_path):
    p = write_csv(tmp_path / "w.csv", ramp_rows())
    flight = NS(conditions=spec(series=p, sky_c=-22.0), flight=NS(start=START, end=END, frames=None),
                layout=NS(tilt_deg=20.0), module=MODULE)
    mods = make_modules([(500_000.0, 4_000_000.0)])
    fc, mc, v = cond.conditions_for_flight(flight, mods, gsd_m=0.025, settings=SETTINGS)
    assert fc.source == "series" and fc.temp_sky == -22.0
    assert mc["poa_global"].iloc[0] == pytest.approx(850.0)
    assert v.ok
