"""Layout ingest: reprojection, table splitting, ids, module-local frames."""
from __future__ import annotations

import json
import math

import geopandas as gpd
import numpy as np
import pytest
from pyproj import CRS, Transformer
from shapely import affinity
from shapely.geometry import Point, Polygon, box, mapping

from pvscan.errors import LayoutError
from pvscan.io.layout import FRAME_COLUMNS, LayoutWarning, build_modules, read_layout, region_polygon, xy_to_uv
from pvscan.io.manifest import LayoutSpec

UTM32N = "EPSG:32632"
W_MOD, L_MOD = 1.038, 2.094  # module width/length [m]


def table_polygon(x0, y0, rows, cols, gap, tilt, orientation="portrait", angle=0.0):
    c = math.cos(math.radians(tilt))
    if orientation == "portrait":
        along, across = W_MOD, L_MOD * c
    else:
        along, across = L_MOD, W_MOD * c
    length = cols * along + (cols - 1) * gap
    width = rows * across + (rows - 1) * gap * c
    t = box(x0, y0, x0 + length, y0 + width)
    return affinity.rotate(t, angle, origin="centroid") if angle else t


# --- pyproj against published conversions --------------------------------------------------
def test_pyproj_epsg_guidance_note_transverse_mercator():
    # Source: IOGP/EPSG Guidance Note 7-2, Transverse Mercator worked example (OSGB 1936 /
    # British National Grid): 50d30'N, 0d30'E -> E 577274.99 m, N 69740.50 m.
    t = Transformer.from_crs("EPSG:4277", "EPSG:27700", always_xy=True)
    e, n = t.transform(0.5, 50.5)
    assert e == pytest.approx(577274.99, abs=0.02)
    assert n == pytest.approx(69740.50, abs=0.02)


def test_pyproj_snyder_transverse_mercator_example():
    # Source: Snyder (1987), Map Projections - A Working Manual, USGS PP 1395, numerical example
    # for the ellipsoidal Transverse Mercator (Clarke 1866, lon0 75W, k0 0.9996):
    # 40d30'N 73d30'W -> x = 127,106.5 m, y = 4,484,124.4 m (values from memory, 0.1 m as printed).
    tm = CRS.from_proj4("+proj=tmerc +lat_0=0 +lon_0=-75 +k=0.9996 +x_0=0 +y_0=0 +ellps=clrk66 +units=m")
    geo = CRS.from_proj4("+proj=longlat +ellps=clrk66")
    x, y = Transformer.from_crs(geo, tm, always_xy=True).transform(-73.5, 40.5)
    assert x == pytest.approx(127106.5, abs=0.1)
    assert y == pytest.approx(4484124.4, abs=0.1)


# --- table splitting ------------------------------------------------------------------------
@pytest.mark.parametrize("angle", [0.0, 17.0, -35.0])
@pytest.mark.parametrize("orientation", ["portrait", "landscape"])
def test_table_split_footprints(angle, orientation):
    rows, cols, gap, tilt = 2, 6, 0.02, 25.0
    t = table_polygon(500000, 5000000, rows, cols, gap, tilt, orientation, angle)
    spec = LayoutSpec(rows=rows, cols=cols, orientation=orientation, gap_m=gap, tilt_deg=tilt, azimuth_deg=180)
    m = build_modules(gpd.GeoDataFrame({"table_id": ["A"]}, geometry=[t], crs=UTM32N), spec)
    assert len(m) == rows * cols
    c = math.cos(math.radians(tilt))
    # every footprint is the module as seen from above: width x length*cos(tilt) (portrait)
    expected_area = W_MOD * L_MOD * c
    assert np.allclose(m.area, expected_area, rtol=1e-9)
    # footprints tile the table without overlap and stay inside it
    assert m.union_all().area == pytest.approx(rows * cols * expected_area, rel=1e-9)
    assert all(t.buffer(1e-6).contains(g) for g in m.geometry)
    # the long side of the frame is the module's long side as seen from above
    lu = np.hypot(m.fux, m.fuy)
    lv = np.hypot(m.fvx, m.fvy)
    if orientation == "portrait":
        np.testing.assert_allclose(lu, L_MOD * c)
        np.testing.assert_allclose(lv, W_MOD)
        assert (m.lower_edge == "u").all()
    else:
        np.testing.assert_allclose(lu, L_MOD)
        np.testing.assert_allclose(lv, W_MOD * c)
        assert (m.lower_edge == "v").all()
    # right-handed frames
    assert (m.fux * m.fvy - m.fuy * m.fvx > 0).all()
    # ids and positions
    assert list(m.module_id[:2]) == ["A-R1-C01", "A-R1-C02"]
    assert set(m.table_row) == {1, 2} and set(m.table_col) == set(range(1, cols + 1))


def test_lower_edge_faces_the_azimuth_both_hemispheres():
    for az, lower_is_south in ((180.0, True), (0.0, False)):
        t = table_polygon(500000, 5000000, 2, 4, 0.02, 20)
        spec = LayoutSpec(rows=2, cols=4, gap_m=0.02, tilt_deg=20, azimuth_deg=az)
        m = build_modules(gpd.GeoDataFrame(geometry=[t], crs=UTM32N), spec)
        # u = 0 is the lower edge: it must lie toward the facing direction
        y_low = m.fy0 + 0.5 * m.fvy
        y_high = m.fy0 + m.fuy + 0.5 * m.fvy
        assert ((y_low < y_high) == lower_is_south).all()
        # row 1 is the lower row
        cy = m.geometry.centroid.y
        r1 = cy[m.table_row == 1].mean()
        r2 = cy[m.table_row == 2].mean()
        assert (r1 < r2) == lower_is_south
        assert m.table_id.iloc[0] == "T0001"


def test_frame_round_trip_and_region_polygon():
    t = table_polygon(500000, 5000000, 1, 3, 0.02, 25, angle=30)
    m = build_modules(gpd.GeoDataFrame(geometry=[t], crs=UTM32N), LayoutSpec(rows=1, cols=3))
    frame = m[FRAME_COLUMNS].to_numpy()[0]
    rng = np.random.default_rng(1)
    u, v = rng.random(100), rng.random(100)
    x = frame[0] + u * frame[2] + v * frame[4]
    y = frame[1] + u * frame[3] + v * frame[5]
    uu, vv = xy_to_uv(frame, x, y)
    np.testing.assert_allclose(uu, u, atol=1e-9)
    np.testing.assert_allclose(vv, v, atol=1e-9)
    whole = region_polygon(m, 0, 0, 1, 0, 1)
    assert whole.symmetric_difference(m.geometry.iloc[0]).area < 1e-6
    third = region_polygon(m, 0, 0, 1, 0, 1 / 3)
    assert third.area == pytest.approx(whole.area / 3)
    assert third.exterior.is_ccw


# --- files and CRSs -------------------------------------------------------------------------
def _lonlat_table_geojson(tmp_path, legacy_crs=False):
    t = table_polygon(500000, 5000000, 2, 4, 0.02, 25, angle=10)
    gdf = gpd.GeoDataFrame({"table_id": ["N1"]}, geometry=[t], crs=UTM32N)
    if legacy_crs:
        gdf = gdf.to_crs("EPSG:3857")
        fc = json.loads(gdf.to_json())
        fc["crs"] = {"type": "name", "properties": {"name": "urn:ogc:def:crs:EPSG::3857"}}
    else:
        fc = json.loads(gdf.to_crs("EPSG:4326").to_json())
    p = tmp_path / "layout.geojson"
    p.write_text(json.dumps(fc))
    return p, t


@pytest.mark.parametrize("legacy", [False, True])
def test_geojson_reprojected_to_ortho_crs(tmp_path, legacy):
    p, t = _lonlat_table_geojson(tmp_path, legacy)
    m = read_layout(p, UTM32N, LayoutSpec(rows=2, cols=4, gap_m=0.02, tilt_deg=25))
    assert m.crs.to_epsg() == 32632
    assert len(m) == 8
    # the table is back where it was drawn, to the millimetre
    assert m.union_all().convex_hull.symmetric_difference(t).area < 0.01


def test_geopackage_and_shapefile_module_polygons(tmp_path):
    t = table_polygon(400000, 6000000, 1, 4, 0.02, 25)
    mods = build_modules(gpd.GeoDataFrame(geometry=[t], crs="EPSG:32633"), LayoutSpec(rows=1, cols=4))
    out = gpd.GeoDataFrame({
        "module_id": [f"X{i}" for i in range(4)],
        "string_id": ["S1"] * 4,
        "string_idx": [1, 2, 3, 4],
    }, geometry=list(mods.geometry), crs="EPSG:32633")
    out.to_file(tmp_path / "m.gpkg", engine="pyogrio")
    out.to_file(tmp_path / "m.shp", engine="pyogrio")
    for name in ("m.gpkg", "m.shp"):
        m = read_layout(tmp_path / name, "EPSG:32633", LayoutSpec())
        assert list(m.module_id) == ["X0", "X1", "X2", "X3"]
        assert list(m.string_index) == [1, 2, 3, 4]
        # loose modules that touch are grouped into one table with positions along it
        assert m.table_id.nunique() == 1
        assert sorted(m.table_col) == [1, 2, 3, 4]


def test_bad_features_are_named(tmp_path):
    gdf = gpd.GeoDataFrame({"module_id": ["A", "B"]}, geometry=[box(0, 0, 2, 1), Point(5, 5)], crs=UTM32N)
    with pytest.raises(LayoutError, match="module_id B: Point is not a polygon"):
        build_modules(gdf, LayoutSpec())
    dup = gpd.GeoDataFrame({"module_id": ["A", "A"]}, geometry=[box(0, 0, 2, 1), box(3, 0, 5, 1)], crs=UTM32N)
    with pytest.raises(LayoutError, match="module_id A appears more than once"):
        build_modules(dup, LayoutSpec())
    empty = gpd.GeoDataFrame({"module_id": ["E"]}, geometry=[Polygon()], crs=UTM32N)
    with pytest.raises(LayoutError, match="module_id E: empty geometry"):
        build_modules(empty, LayoutSpec())
    with pytest.raises(LayoutError, match="not found"):
        read_layout(tmp_path / "none.geojson", UTM32N)
    (tmp_path / "junk.geojson").write_text("{not json")
    with pytest.raises(LayoutError, match="cannot read the layout"):
        read_layout(tmp_path / "junk.geojson", UTM32N)


def test_table_too_small_for_its_modules():
    gdf = gpd.GeoDataFrame({"table_id": ["tiny"], "rows": [2], "cols": [250]}, geometry=[box(0, 0, 0.5, 4)], crs=UTM32N)
    with pytest.raises(LayoutError, match="table_id tiny: .*cannot hold"):
        build_modules(gdf, LayoutSpec(gap_m=0.02))


def test_geojson_feature_mapping_unused_import_guard():
    # mapping() of a footprint is plain GeoJSON (used by outputs); keeps shapely's API honest
    assert mapping(box(0, 0, 1, 1))["type"] == "Polygon"


def test_geojson_properties_kept_as_written(tmp_path):
    # An id like "T1006" must stay a string (a type-guessing reader may take it for a time).
    t = table_polygon(500000, 5000000, 1, 2, 0.02, 25)
    gdf = gpd.GeoDataFrame({"table_id": ["T1006"], "string_id": ["0012"]}, geometry=[t], crs=UTM32N)
    p = tmp_path / "l.geojson"
    p.write_text(gdf.to_crs("EPSG:4326").to_json())
    with pytest.warns(LayoutWarning, match="string_id gives 1 string id but no field gives"):
        m = read_layout(p, UTM32N, LayoutSpec(rows=1, cols=2))  # a table's string: no positions
    assert list(m.table_id.unique()) == ["T1006"]
    assert list(m.string_id.unique()) == ["0012"]
    assert m.module_id.iloc[0] == "T1006-R1-C01"


@pytest.mark.parametrize("angle", [89.9, 90.0, 90.1, -89.95])
def test_north_south_tables_count_columns_from_the_south(angle):
    # rounding of a lon/lat layout leaves a north-south table a hair off 90 deg either way
    t = table_polygon(500000, 5000000, 1, 6, 0.02, 0, angle=angle)
    m = build_modules(gpd.GeoDataFrame(geometry=[t], crs=UTM32N),
                      LayoutSpec(rows=1, cols=6, azimuth_deg=90, tilt_deg=0))
    cy = m.geometry.centroid.y.to_numpy()
    assert cy[m.table_col.to_numpy() == 1][0] == pytest.approx(cy.min())


def test_layout_package_keeps_one_copy_of_each_public_name():
    # io/layout/ is split by task (read, fields, frames, split, build); pvscan.io.layout
    # re-exports every public name, the very objects of the submodules.
    import pvscan.io.layout as layout
    from pvscan.io.layout import build, fields, frames, read, split

    for mod in (build, fields, frames, read, split):
        for name in mod.__all__:
            assert name in layout.__all__ and getattr(layout, name) is getattr(mod, name), name
