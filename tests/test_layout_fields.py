"""Layout fields as GIS software writes them, and what a layout without stringing loses.

Shapefile field names stop at 10 characters (dBASE III; the ESRI Shapefile Technical
Description, 1998, names the attribute table format), so GDAL writes ``string_index`` as
``string_ind``; the test writes the Shapefile with GDAL itself (pyogrio) and reads it back.
"""
from __future__ import annotations

import warnings

import geopandas as gpd
import pytest
from shapely.geometry import box

from pvscan.errors import LayoutError
from pvscan.io.layout import FIELD_NAMES, LayoutWarning, layout_fields, read_layout
from pvscan.io.manifest import LayoutSpec

UTM32N = "EPSG:32632"
W, L = 1.038, 2.094  # module footprint [m] (flat: tilt 0)


def _modules(n=12, per_string=6):
    """One row of n portrait modules, strings of `per_string` modules."""
    geoms = [box(500000 + k * (W + 0.02), 5000000, 500000 + k * (W + 0.02) + W, 5000000 + L) for k in range(n)]
    return {"module_id": [f"A-{k + 1:02d}" for k in range(n)], "table_id": ["A"] * n,
            "string_id": [f"S{k // per_string + 1}" for k in range(n)],
            "string_index": [k % per_string + 1 for k in range(n)]}, geoms


def _write(tmp_path, props, geoms, name="layout.shp"):
    path = tmp_path / name
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # GDAL says it truncates field names: that is the point
        gpd.GeoDataFrame(props, geometry=geoms, crs=UTM32N).to_file(path, engine="pyogrio")
    return path


def _read(path, **kw):
    return read_layout(path, UTM32N, LayoutSpec(tilt_deg=0.0), **kw)


def test_shapefile_truncated_names_are_read(tmp_path):
    props, geoms = _modules()
    props["orientation"] = ["portrait"] * len(geoms)
    path = _write(tmp_path, props, geoms)
    written = list(gpd.read_file(path).columns)
    assert "string_ind" in written and "orientatio" in written  # GDAL cut them at 10 characters
    with warnings.catch_warnings():
        warnings.simplefilter("error", LayoutWarning)  # a complete stringing: no warning
        m = _read(path)
    assert m["string_index"].tolist() == props["string_index"]
    assert m["string_id"].tolist() == props["string_id"]
    assert m.attrs["layout"]["fields"]["string_index"] == "string_ind"
    assert m.attrs["layout"]["strings"] == "complete" and m.attrs["layout"]["n_strings"] == 2


@pytest.mark.parametrize("names", [
    {"module_id": "MODULE_ID", "string_id": "String ID", "string_index": "STRING_IDX", "table_id": "Table-Id"},
    {"module_id": "ModuleId", "string_id": "str_id", "string_index": "str_index", "table_id": "tbl_id"},
    {"module_id": "module_no", "string_id": "string", "string_index": "string_position", "table_id": "table"},
])
def test_common_variants_are_read(tmp_path, names):
    props, geoms = _modules()
    renamed = {names[k]: v for k, v in props.items()}
    path = tmp_path / "layout.geojson"
    path.write_text(gpd.GeoDataFrame(renamed, geometry=geoms, crs=UTM32N).to_crs("EPSG:4326").to_json())
    m = _read(path)
    assert m["module_id"].tolist() == props["module_id"]
    assert m["string_index"].tolist() == props["string_index"]
    assert m.attrs["layout"]["fields"] == {k: names[k] for k in sorted(names)}


def test_every_alias_reads_one_property():
    seen = {}
    for prop, aliases in FIELD_NAMES.items():
        fields, _ = layout_fields(aliases)
        assert fields == {prop: aliases[0]}  # the canonical name is preferred
        for a in aliases:
            assert seen.setdefault(a, prop) == prop


@pytest.mark.parametrize("drop, status, words", [
    ("string_index", "ids_only", ["string_id gives 2 string ids", "string_index", "open strings and PID",
                                  "not looked for"]),
    ("string_id", "positions_only", ["field string_ind gives positions", "string_id",
                                     "open strings and PID are looked for only along table rows"]),
])
def test_half_a_stringing_is_a_warning_naming_the_field_and_the_loss(tmp_path, drop, status, words):
    props, geoms = _modules()
    props.pop(drop)
    path = _write(tmp_path, props, geoms)
    with pytest.warns(LayoutWarning) as rec:
        m = _read(path)
    msg = " ".join(str(w.message) for w in rec)
    assert all(w in msg for w in words), msg
    assert m.attrs["layout"]["strings"] == status and len(m.attrs["layout"]["warnings"]) == 1


def test_modules_missing_half_their_stringing_are_counted(tmp_path):
    props, geoms = _modules()
    props["string_index"] = [None, *props["string_index"][1:]]
    props["string_index"][5] = 3  # string S1 gives position 3 twice
    path = tmp_path / "layout.geojson"
    path.write_text(gpd.GeoDataFrame(props, geometry=geoms, crs=UTM32N).to_crs("EPSG:4326").to_json())
    with pytest.warns(LayoutWarning) as rec:
        m = _read(path)
    msgs = [str(w.message) for w in rec]
    assert any("1 of 12 modules have a string id" in x for x in msgs)
    assert any("1 string(s) give one position" in x for x in msgs)
    assert m.attrs["layout"]["strings"] == "partial"


@pytest.mark.parametrize("value", ["third", 2.5, "1e400"])
def test_a_string_position_that_is_not_a_whole_number_names_the_feature(tmp_path, value):
    props, geoms = _modules()
    props["string_index"] = [str(v) for v in props["string_index"]]
    props["string_index"][3] = str(value)
    path = tmp_path / "layout.geojson"
    path.write_text(gpd.GeoDataFrame(props, geometry=geoms, crs=UTM32N).to_crs("EPSG:4326").to_json())
    with pytest.raises(LayoutError, match=r"module_id A-04: string_index .* is not a whole number"):
        _read(path)


def test_whole_numbers_stored_as_text_or_floats_are_read(tmp_path):
    props, geoms = _modules()
    props["string_index"] = [f"{v}" if k % 2 else float(v) for k, v in enumerate(props["string_index"])]
    props["module_id"] = [float(k + 1) for k in range(len(geoms))]  # numeric ids a GIS made floats
    path = _write(tmp_path, props, geoms, "layout.gpkg")
    m = _read(path)
    assert m["string_index"].tolist() == [k % 6 + 1 for k in range(12)]
    assert m["module_id"].tolist() == [str(k + 1) for k in range(12)]


def test_combiner_and_inverter_ids_are_carried_through_a_shapefile(tmp_path):
    props, geoms = _modules()
    props["combiner_id"] = [f"CB{k // 4 + 1}" for k in range(12)]
    props["inverter_id"] = [7] * 6 + [8] * 6  # numbers, as a GIS often stores them
    path = _write(tmp_path, props, geoms)
    written = list(gpd.read_file(path).columns)
    assert "combiner_i" in written and "inverter_i" in written  # cut at 10 characters
    m = _read(path)
    assert m["combiner_id"].tolist() == props["combiner_id"]
    assert m["inverter_id"].tolist() == ["7"] * 6 + ["8"] * 6
    assert m.attrs["layout"]["fields"]["combiner_id"] == "combiner_i"
    cols = list(m.columns)
    assert cols[cols.index("string_id"):cols.index("table_row")] == [
        "string_id", "string_index", "combiner_id", "inverter_id"]


@pytest.mark.parametrize("combiner, inverter", [("combiner", "inverter"), ("Combiner Box", "INV_ID"),
                                                ("cb_id", "inv"), ("combiner_box_id", "inverter_no")])
def test_combiner_and_inverter_variants_are_read(tmp_path, combiner, inverter):
    props, geoms = _modules()
    props[combiner] = ["CB-A"] * 12
    props[inverter] = ["INV-1"] * 12
    path = tmp_path / "layout.geojson"
    path.write_text(gpd.GeoDataFrame(props, geometry=geoms, crs=UTM32N).to_crs("EPSG:4326").to_json())
    m = _read(path)
    assert set(m["combiner_id"]) == {"CB-A"} and set(m["inverter_id"]) == {"INV-1"}
    assert m.attrs["layout"]["fields"]["combiner_id"] == combiner
    assert m.attrs["layout"]["fields"]["inverter_id"] == inverter


def test_without_combiner_or_inverter_the_columns_are_none(tmp_path):
    props, geoms = _modules()
    props["combiner_id"] = ["CB1"] * 6 + [None] * 6  # given for half the modules only
    path = tmp_path / "layout.geojson"
    path.write_text(gpd.GeoDataFrame(props, geometry=geoms, crs=UTM32N).to_crs("EPSG:4326").to_json())
    m = _read(path)
    # missing as pandas writes it in a text column (None, or NaN under pandas 3's string dtype)
    assert m["combiner_id"].tolist()[:6] == ["CB1"] * 6 and m["combiner_id"].isna().tolist() == [False] * 6 + [True] * 6
    assert m["inverter_id"].isna().all()


def test_a_table_gives_its_combiner_and_inverter_to_each_of_its_modules(tmp_path):
    tables = [box(500000, 5000000 + k * 10, 500000 + 12 * (W + 0.02), 5000000 + k * 10 + 2 * L + 0.02)
              for k in range(2)]
    props = {"table_id": ["A", "B"], "rows": [2, 2], "cols": [12, 12], "combiner_id": ["CB1", None],
             "inverter_id": ["INV1", "INV1"]}
    path = _write(tmp_path, props, tables, "tables.gpkg")
    m = _read(path)
    assert len(m) == 48
    a = m["table_id"] == "A"
    assert m.loc[a, "combiner_id"].tolist() == ["CB1"] * 24
    assert m.loc[~a, "combiner_id"].isna().all()
    assert set(m["inverter_id"]) == {"INV1"}
