"""Ortho ingest: unit conversion, nodata, windows, overviews, and clear errors for broken files."""
from __future__ import annotations

import numpy as np
import pytest
import rasterio
from affine import Affine
from rasterio.windows import Window
from scipy.constants import zero_Celsius

from pvscan.errors import OrthoError, PvscanError
from pvscan.io.ortho import KELVIN_OFFSET, open_orthos


def test_kelvin_offset_is_codata_zero_celsius():
    # Source: scipy.constants (CODATA / SI): 0 degC = 273.15 K exactly.
    assert KELVIN_OFFSET == zero_Celsius


def test_celsius_float_passthrough(write_tif, rng):
    data = (25 + 5 * rng.random((50, 70))).astype("float32")
    p = write_tif("c.tif", data)
    with open_orthos(p, {"units": "celsius"}) as o:
        got = o.read(0, Window(0, 0, 70, 50))
    assert got.dtype == np.float32
    np.testing.assert_array_equal(got, data)


def test_kelvin_scale_offset_counts(write_tif):
    # A 16-bit radiometric export storing centikelvin: K = raw * 0.01; degC = K - 273.15
    # (SI definition of the Celsius scale, scipy.constants.zero_Celsius).
    raw = np.array([[30015, 31315], [27315, 0]], dtype="uint16")
    p = write_tif("k.tif", raw, nodata=0, tiled=False)
    with open_orthos([p], {"units": "kelvin", "scale": 0.01, "offset": 0.0}) as o:
        got = o.read(0, Window(0, 0, 2, 2))
    expect = raw.astype(float) * 0.01 - zero_Celsius
    # float32 arithmetic on ~300 K values: resolution 3e-5 K.
    np.testing.assert_allclose(got[raw > 0], expect[raw > 0], atol=1e-4)
    assert np.isnan(got[1, 1])  # file nodata tag


def test_scale_offset_celsius(write_tif):
    raw = np.array([[1000, 2000, 3000]], dtype="int16")
    p = write_tif("s.tif", raw, tiled=False)
    with open_orthos(p, {"units": "celsius", "scale": 0.02, "offset": -10.0}) as o:
        got = o.read(0, ((0, 1), (0, 3)))
    np.testing.assert_allclose(got[0], [10.0, 30.0, 50.0], atol=1e-5)


def test_nodata_override_replaces_file_tag(write_tif):
    data = np.array([[0.0, 20.0, -9999.0, 30.0]], dtype="float32")
    p = write_tif("n.tif", data, nodata=0.0, tiled=False)
    with open_orthos(p, {"units": "celsius"}) as o:
        tag = o.read(0, ((0, 1), (0, 4)))
    with open_orthos(p, {"units": "celsius", "nodata": -9999}) as o:
        over = o.read(0, ((0, 1), (0, 4)))
    # File tag: 0 is nodata; -9999 is implausible (below plausible_min_c) -> NaN as well.
    assert np.isnan(tag[0, 0]) and np.isnan(tag[0, 2])
    # Override: -9999 is nodata, and 0 degC becomes a valid value.
    assert over[0, 0] == 0.0 and np.isnan(over[0, 2])
    assert over[0, 1] == 20.0 and over[0, 3] == 30.0


def test_nodata_not_representable_in_dtype(write_tif):
    raw = np.array([[100, 200]], dtype="uint16")
    p = write_tif("u.tif", raw, tiled=False)
    with open_orthos(p, {"units": "celsius", "scale": 0.1, "nodata": -9999}) as o:
        got = o.read(0, ((0, 1), (0, 2)))
    np.testing.assert_allclose(got[0], [10.0, 20.0], atol=1e-5)


def test_nan_and_implausible_values_become_nan(write_tif):
    data = np.array([[np.nan, 25.0, 1.0e6, -500.0, 249.0, -59.0]], dtype="float32")
    p = write_tif("x.tif", data, tiled=False)
    with open_orthos(p) as o:
        got = o.read(0, ((0, 1), (0, 6)))
    assert np.isnan(got[0, [0, 2, 3]]).all()
    np.testing.assert_array_equal(got[0, [1, 4, 5]], [25.0, 249.0, -59.0])


def test_plausible_range_from_settings(write_tif):
    data = np.array([[5.0, 50.0, 95.0]], dtype="float32")
    p = write_tif("r.tif", data, tiled=False)
    settings = {"plausible_min_c": 10.0, "plausible_max_c": 90.0}
    with open_orthos(p, None, settings) as o:
        got = o.read(0, ((0, 1), (0, 3)))
    assert np.isnan(got[0, 0]) and got[0, 1] == 50.0 and np.isnan(got[0, 2])


def test_internal_mask_band_is_honoured(write_tif):
    data = np.full((8, 8), 30.0, dtype="float32")
    mask = np.ones((8, 8), bool)
    mask[2:4, 5:7] = False
    p = write_tif("m.tif", data, mask=mask, tiled=False)
    with open_orthos(p) as o:
        assert o.tiles[0].has_mask
        got = o.read(0, Window(0, 0, 8, 8))
    np.testing.assert_array_equal(np.isnan(got), ~mask)


def test_window_beyond_raster_is_padded_with_nan(write_tif, rng):
    data = rng.normal(30, 1, (40, 30)).astype("float32")
    p = write_tif("w.tif", data)
    with open_orthos(p) as o:
        got = o.read(0, Window(-5, 35, 20, 10))  # cols -5..15, rows 35..45
    assert got.shape == (10, 20)
    np.testing.assert_array_equal(got[:5, 5:], data[35:40, 0:15])
    assert np.isnan(got[:, :5]).all() and np.isnan(got[5:]).all()


def test_window_cache_reads_the_same_pixels_as_read(write_tif, rng):
    # Reference: the array written to the file (numpy) and OrthoSet.read: windows inside, across
    # chunk borders, beyond the raster and wholly outside, with nodata and implausible values.
    data = rng.normal(30, 3, (150, 170)).astype("float32")
    data[rng.random(data.shape) < 0.05] = -9999.0
    data[10:14, 20:30] = 500.0  # outside the plausible range: NaN
    p = write_tif("cache.tif", data, nodata=-9999.0)
    wins = [Window(0, 0, 170, 150), Window(60, 60, 9, 9), Window(30, 50, 40, 35), Window(-7, 140, 25, 20),
            Window(160, -4, 15, 12), Window(400, 400, 5, 5)]
    wins += [Window(int(c), int(r), 11, 13) for c, r in zip(rng.integers(-10, 175, 40), rng.integers(-10, 155, 40))]
    with open_orthos(p) as o:
        plain = [o.read(0, w) for w in wins]
        with o.window_cache(chunk_px=32, max_chunks=3) as read:
            cached = [read(0, w) for w in wins]
    for w, a, b in zip(wins, plain, cached):
        assert b.dtype == np.float32 and b.shape == (int(w.height), int(w.width))
        np.testing.assert_array_equal(a, b)
    inner = plain[0]
    assert np.isnan(inner[data == -9999.0]).all() and np.isnan(inner[10:14, 20:30]).all()
    ok = (data != -9999.0)
    ok[10:14, 20:30] = False
    np.testing.assert_array_equal(inner[ok], data[ok])



def test_window_cache_keeps_part_of_a_cycle_longer_than_itself(write_tif, rng, monkeypatch):
    # Reference: Johnson and Shasha (1994), "2Q: a low overhead high performance buffer
    # management replacement algorithm" (VLDB); and the textbook property of LRU that a loop
    # over more pages than the cache holds misses on every access (each page is dropped just
    # before it is needed again). A registration samples the same spread of modules pass after
    # pass: the chunk reader must keep part of such a loop, and return OrthoSet.read's pixels.
    import pvscan.io.ortho_chunks as oc

    data = rng.normal(30, 3, (16 * 8, 16 * 8)).astype("float32")  # 8 x 8 chunks of 16 px
    p = write_tif("twoq.tif", data)
    decoded: list[tuple[int, int]] = []
    read_into = oc._read_into

    def counting(ds, tile, win):
        decoded.append((int(win.row_off), int(win.col_off)))
        return read_into(ds, tile, win)

    monkeypatch.setattr(oc, "_read_into", counting)
    loop = [Window(16 * (k % 8), 16 * (k // 8), 16, 16) for k in range(20)]  # 20 chunks, 16 kept
    passes = 4
    with open_orthos(p) as o:
        with o.window_cache(chunk_px=16, max_chunks=16) as read:
            for _ in range(passes):
                for w in loop:
                    np.testing.assert_array_equal(read(0, w), o.read(0, w))
    assert len(set(decoded)) == len(loop)
    assert len(loop) <= len(decoded) < passes * len(loop)  # LRU: passes * len(loop)


def test_two_queues_bounds_and_promotion():
    # Reference: Johnson and Shasha (1994), the 2Q "full version": Kin = 25 %, Kout = 50 % of
    # the capacity; a key met again while remembered in A1out goes to Am.
    from pvscan.io.ortho_chunks import _TwoQueues

    q = _TwoQueues(8)
    assert (q.k_in, q.k_out) == (2, 4)
    for k in range(8):
        q.put(k, str(k))
    assert len(q.a1in) == 8 and not q.am
    q.put(8, "8")  # full: the oldest of A1in leaves, its key remembered
    assert 0 not in q.a1in and list(q.a1out) == [0] and q.get(0) is None
    q.put(0, "0")  # met again while remembered: the main queue
    assert q.am == {0: "0"} and q.get(0) == "0"
    for k in range(100, 200):
        if q.get(k) is None:
            q.put(k, str(k))
        assert len(q.a1in) + len(q.am) <= 8 and len(q.a1out) <= 4
    assert q.get(0) == "0"  # a scan of keys met once did not push it out


def test_tile_metadata(write_tif):
    p = write_tif("t.tif", np.zeros((100, 200), "float32"), gsd=0.05, block=32)
    with open_orthos(p) as o:
        t = o.tiles[0]
        assert (t.width, t.height, t.block_shape) == (200, 100, (32, 32))
        assert t.gsd_m == pytest.approx(0.05) and o.gsd_m == pytest.approx(0.05)
        assert o.crs == rasterio.crs.CRS.from_epsg(32633)
        assert t.bounds.right - t.bounds.left == pytest.approx(10.0)
    assert o.closed


@pytest.mark.parametrize("tiled,block", [(True, 32), (False, 16)])
def test_block_windows_cover_raster_once_aligned(write_tif, tiled, block):
    p = write_tif("b.tif", np.zeros((150, 170), "float32"), tiled=tiled, block=block)
    with open_orthos(p) as o:
        bh, bw = o.tiles[0].block_shape
        hits = np.zeros((150, 170), int)
        for w in o.block_windows(0, 64):
            assert w.row_off % bh == 0 and w.col_off % (bw if tiled else 1) == 0
            hits[w.row_off : w.row_off + w.height, w.col_off : w.col_off + w.width] += 1
        rows, cols = o.block_shape(0, 64)
    assert (hits == 1).all()
    assert rows % bh == 0
    if tiled:
        assert cols % bw == 0


def test_read_overview_mosaic(write_tif, rng):
    a = rng.normal(20, 1, (100, 100)).astype("float32")
    b = rng.normal(40, 1, (100, 100)).astype("float32")
    pa = write_tif("a.tif", a, origin=(500_000.0, 4_000_000.0))
    pb = write_tif("b.tif", b, origin=(500_002.5, 4_000_000.0))  # 2.5 m east: half overlap
    with open_orthos([pa, pb]) as o:
        ov, tr = o.read_overview(max_px=30)
    assert max(ov.shape) <= 30
    assert tr.a == pytest.approx(-tr.e)
    assert tr.c == pytest.approx(500_000.0) and tr.f == pytest.approx(4_000_000.0)
    # covers the 7.5 m x 5 m union at 0.25 m/px without gaps
    assert ov.shape == (20, 30)
    assert not np.isnan(ov).any()
    # tile a alone in the west, tile b alone in the east, the first tile wins the overlap
    assert abs(ov[:, :10].mean() - 20) < 0.5 and abs(ov[:, 20:].mean() - 40) < 0.5
    assert abs(ov[:, 10:20].mean() - 20) < 0.5


def test_open_orthos_accepts_flight_like(write_tif):
    from types import SimpleNamespace

    from pvscan.io.manifest import OrthoSpec

    p = write_tif("f.tif", np.full((4, 4), 300.0, "float32"))
    flight = SimpleNamespace(flight=SimpleNamespace(orthos=(p,)), ortho=OrthoSpec(units="kelvin"))
    with open_orthos(flight) as o:
        assert o.read(0, Window(0, 0, 4, 4))[0, 0] == pytest.approx(300.0 - zero_Celsius, abs=1e-4)


def test_read_after_close_raises(write_tif):
    p = write_tif("z.tif", np.zeros((4, 4), "float32"))
    o = open_orthos(p)
    o.close()
    with pytest.raises(OrthoError, match="z.tif"):
        o.read(0, Window(0, 0, 2, 2))


# ------------------------------------------------------------------ broken input
def _msg(excinfo) -> str:
    msg = str(excinfo.value)
    assert "\n" not in msg
    return msg


def test_missing_file(tmp_path):
    with pytest.raises(OrthoError, match="nothere.tif: ortho file not found") as e:
        open_orthos([tmp_path / "nothere.tif"])
    assert isinstance(e.value, PvscanError) and isinstance(e.value, OSError)


def test_not_a_raster(tmp_path):
    p = tmp_path / "notes.tif"
    p.write_text("this is not an image")
    with pytest.raises(OrthoError, match="notes.tif: not a readable raster") as e:
        open_orthos(p)
    _msg(e)


def test_other_raster_format(write_tif):
    p = write_tif("grid.img", np.zeros((4, 4), "float32"), driver="ENVI")
    with pytest.raises(OrthoError, match=r"grid.img: not a GeoTIFF \(GDAL reads it as ENVI\)"):
        open_orthos(p)


def test_multiband(write_tif):
    p = write_tif("rgb.tif", np.zeros((3, 4, 4), "uint8"))
    with pytest.raises(OrthoError, match="rgb.tif: has 3 bands"):
        open_orthos(p)


def test_no_crs(write_tif):
    p = write_tif("nocrs.tif", np.zeros((4, 4), "float32"), crs=None)
    with pytest.raises(OrthoError, match="nocrs.tif: no CRS"):
        open_orthos(p)


def test_no_transform(write_tif):
    p = write_tif("notr.tif", np.zeros((4, 4), "float32"), transform=False, crs=None)
    with pytest.raises(OrthoError, match="notr.tif: no geotransform"):
        open_orthos(p)


def test_rotated_transform(write_tif):
    rot = Affine(0.05, 0.01, 500_000.0, 0.01, -0.05, 4_000_000.0)
    p = write_tif("rot.tif", np.zeros((4, 4), "float32"), transform=rot)
    with pytest.raises(OrthoError, match="rot.tif: rotated geotransform"):
        open_orthos(p)


def test_geographic_crs(write_tif):
    p = write_tif("geo.tif", np.zeros((4, 4), "float32"), crs="EPSG:4326", origin=(13.0, 52.0), gsd=1e-6)
    with pytest.raises(OrthoError, match="geo.tif: CRS EPSG:4326 is not projected"):
        open_orthos(p)


def test_crs_in_feet(write_tif):
    # EPSG:2272 (NAD83 / Pennsylvania South, US survey foot): projected but not metres.
    p = write_tif("ft.tif", np.zeros((4, 4), "float32"), crs="EPSG:2272", origin=(2_000_000.0, 200_000.0))
    with pytest.raises(OrthoError, match="ft.tif: CRS EPSG:2272 is in .*, not metres"):
        open_orthos(p)


def test_tiles_with_different_crs(write_tif):
    a = write_tif("a.tif", np.zeros((4, 4), "float32"))
    b = write_tif("b.tif", np.zeros((4, 4), "float32"), crs="EPSG:32632")
    with pytest.raises(OrthoError, match="b.tif: CRS EPSG:32632 differs from a.tif"):
        open_orthos([a, b])


def test_bad_units(write_tif):
    p = write_tif("u.tif", np.zeros((4, 4), "float32"))
    with pytest.raises(OrthoError, match="u.tif: ortho units 'fahrenheit' unknown"):
        open_orthos(p, {"units": "fahrenheit"})


def test_no_paths():
    with pytest.raises(OrthoError, match="no ortho file"):
        open_orthos([])


def test_nearest_source_index_is_gdals_decimation(write_tif, rng):
    """Reference: GDAL's own nearest-neighbour decimated read (rasterio ``out_shape``) of a
    raster whose values are their pixel's index: the pixels it returns are those
    ``nearest_source_index`` names, on both axes, for random raster and output sizes."""
    from rasterio.enums import Resampling

    from pvscan.io.ortho_overview import nearest_source_index

    for k in range(12):
        h, w = int(rng.integers(20, 400)), int(rng.integers(20, 400))
        index = np.arange(h * w, dtype="int32").reshape(h, w)
        p = write_tif(f"idx{k}.tif", index, block=int(rng.choice([16, 64, 256])))
        oh, ow = int(rng.integers(1, h + 1)), int(rng.integers(1, w + 1))
        with rasterio.open(p) as ds:
            got = ds.read(1, out_shape=(oh, ow), resampling=Resampling.nearest)
        want = index[np.ix_(nearest_source_index(h, oh), nearest_source_index(w, ow))]
        assert np.array_equal(got, want), (h, w, oh, ow)


def _sampler_mosaic(o, max_px, windows):
    from pvscan.io.ortho_overview import OverviewSampler

    s = OverviewSampler(o, max_px)
    for tile, win in windows:
        s.take(tile, win, o.read(tile, win))
    return s, s.finish()


def test_overview_sampler_is_read_overview(write_tif, rng):
    """Reference: ``OrthoSet.read_overview`` (GDAL's decimated reads): the mosaic gathered
    from any set of full-resolution windows (reaching beyond the tiles too) and completed by
    the sampler is the same array, NaN (nodata, implausible values) where it is NaN, with
    the same transform; for two overlapping tiles at several sizes."""
    a = rng.normal(20, 1, (150, 210)).astype("float32")
    b = rng.normal(40, 1, (130, 170)).astype("float32")
    a[rng.random(a.shape) < 0.05] = -9999.0  # nodata
    b[:5, :7] = 900.0  # implausible: NaN
    pa = write_tif("a.tif", a, nodata=-9999.0, origin=(500_000.0, 4_000_000.0))
    pb = write_tif("b.tif", b, origin=(500_004.3, 3_999_998.1), block=32)
    with open_orthos([pa, pb]) as o:
        for max_px in (7, 40, 101, 215):
            want, wt = o.read_overview(max_px)
            for n_windows in (0, 3, 25):
                windows = []
                for _ in range(n_windows):
                    t = int(rng.integers(0, 2))
                    th, tw = o.tiles[t].height, o.tiles[t].width
                    r0, c0 = int(rng.integers(-20, th)), int(rng.integers(-20, tw))
                    windows.append((t, Window(c0, r0, int(rng.integers(1, 90)), int(rng.integers(1, 90)))))
                s, (got, gt) = _sampler_mosaic(o, max_px, windows)
                assert s.usable
                assert gt == wt
                assert got.dtype == want.dtype == np.float32
                assert np.array_equal(got, want, equal_nan=True), (max_px, n_windows)


def test_overview_sampler_defers_to_files_with_overview_levels(write_tif, rng):
    """A file with overview levels (GDAL reads those for a decimated read): the sampler is
    not usable and gives ``read_overview``'s own mosaic."""
    from rasterio.enums import Resampling

    data = rng.normal(30, 2, (256, 256)).astype("float32")
    p = write_tif("ovr.tif", data)
    with rasterio.open(p, "r+") as ds:
        ds.build_overviews([2, 4], Resampling.average)
    with open_orthos(p) as o:
        want, _ = o.read_overview(50)
        s, (got, _) = _sampler_mosaic(o, 50, [(0, Window(0, 0, 256, 256))])
    assert not s.usable
    assert np.array_equal(got, want, equal_nan=True)
