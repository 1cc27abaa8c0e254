"""Tests of pvscan.measure.register: layout-to-ortho co-registration.

The scenes are drawn here: rows of tables of modules (portrait, two module rows per table,
tables of different lengths along a row) rendered into a raster with sub-pixel coverage,
at a known offset against the layout, with frame lines, ground texture, blur and noise.
The truth is the offset used to draw them.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import geopandas as gpd
import numpy as np
import pytest
import shapely
from affine import Affine
from conftest import test_seed
from rasterio import features
from rasterio.windows import Window
from scipy import ndimage

from pvscan.errors import RegistrationError, RegistrationWarning
from pvscan.measure.register import (
    Registration,
    apply_shift,
    correlation_surface,
    estimate_shift,
    phase_correlate,
)


# ----------------------------------------------------------------------------------
# scene builder
# ----------------------------------------------------------------------------------
@dataclass
class Tile:
    transform: Affine
    crs: str
    width: int
    height: int
    bounds: tuple
    gsd_m: float
    path: str = "mem.tif"


class ArrayOrthos:
    """Minimal ortho set over in-memory arrays (the read interface of pvscan.io.ortho)."""

    def __init__(self, arrays, transforms, crs):
        self.arrays = arrays
        self.tiles = []
        for k, (a, t) in enumerate(zip(arrays, transforms)):
            h, w = a.shape
            x0, top = t @ (0, 0)
            r, b = t @ (w, h)
            self.tiles.append(Tile(t, crs, w, h, (min(x0, r), min(b, top), max(x0, r), max(b, top)),
                                   abs(t.a), f"tile{k}.tif"))
        self.reads = []

    def read(self, i, window: Window):
        r0, c0 = int(window.row_off), int(window.col_off)
        h, w = int(window.height), int(window.width)
        self.reads.append((i, h, w))
        return self.arrays[i][r0:r0 + h, c0:c0 + w].astype(np.float32)


MOD_W, MOD_L = 1.04, 2.09  # module short / long side [m]


def make_layout(origin, n_rows=4, pitch=8.0, lengths=(10, 14, 8, 12), gap=1.5, angle_deg=0.0,
                crs="EPSG:32633"):
    """Module footprints: rows of 2-high portrait tables; tables of given module counts."""
    polys, tab = [], []
    x0, y0 = origin
    for r in range(n_rows):
        x = 0.0
        for k, n in enumerate(np.roll(lengths, r)):
            for row in range(2):
                for c in range(n):
                    px = x + c * (MOD_W + 0.02)
                    py = r * pitch + row * (MOD_L + 0.02)
                    polys.append(shapely.box(px, py, px + MOD_W, py + MOD_L))
                    tab.append(f"T{r}-{k}")
            x += n * (MOD_W + 0.02) + gap
    g = gpd.GeoSeries(polys)
    cx, cy = g.total_bounds[[0, 2]].mean(), g.total_bounds[[1, 3]].mean()
    g = g.rotate(angle_deg, origin=(cx, cy)).translate(x0 - cx, y0 - cy)
    return gpd.GeoDataFrame({"module_id": [f"M{i:04d}" for i in range(len(polys))], "table_id": tab},
                            geometry=g.values, crs=crs)


def render(modules, shift, gsd=0.05, pad=8.0, ss=2, t_ground=38.0, t_module=45.0, blur_px=1.0,
           noise_k=0.3, seed=0, frame_k=-1.5, spread_k=1.0, texture_k=1.5, rotate_deg=0.0,
           rotate_origin=None, hot_spots=0):
    """Raster [degC] of the modules as the camera sees them: the layout rotated by
    ``rotate_deg`` about ``rotate_origin`` (default: the layout's centre), then moved by
    ``shift`` (east, north) [m]; returns ``(image, transform)``."""
    rng = np.random.default_rng(seed)
    g = modules.geometry
    if rotate_deg:
        b = g.total_bounds
        origin = rotate_origin or ((b[0] + b[2]) / 2, (b[1] + b[3]) / 2)
        g = g.rotate(rotate_deg, origin=origin)
    moved = g.translate(*shift)
    x0, b, r, t = moved.total_bounds + np.array([-pad, -pad, pad, pad])
    w, h = int(math.ceil((r - x0) / gsd)), int(math.ceil((t - b) / gsd))
    tr = Affine(gsd, 0, x0, 0, -gsd, t)
    fine = tr @ Affine.scale(1 / ss)
    temps = t_module + spread_k * rng.standard_normal(len(moved))
    img_f = features.rasterize(((p, v) for p, v in zip(moved, temps)), out_shape=(h * ss, w * ss),
                               transform=fine, fill=np.nan, dtype="float32")
    frames = features.rasterize(((p.exterior.buffer(0.03), 1) for p in moved), out_shape=(h * ss, w * ss),
                                transform=fine, fill=0, dtype="uint8")
    # ground texture: smooth noise of ~2 m correlation length (drawn coarse, interpolated)
    step = max(1, int(round(1.0 / gsd)))
    coarse = ndimage.gaussian_filter(rng.standard_normal((h // step + 2, w // step + 2)), 2.0)
    coarse *= 1.0 / coarse.std()
    ground = t_ground + texture_k * ndimage.zoom(coarse, step, order=1)[:h, :w]
    gnd_f = np.repeat(np.repeat(ground.astype(np.float32), ss, 0), ss, 1)
    img_f = np.where(np.isnan(img_f), gnd_f, img_f + np.float32(frame_k) * frames)
    img = img_f.reshape(h, ss, w, ss).mean(axis=(1, 3), dtype=np.float64)
    for _ in range(hot_spots):  # hot cells: +15..25 K spots of ~0.15 m
        i, j = rng.integers(0, h), rng.integers(0, w)
        img[max(i - 1, 0):i + 2, max(j - 1, 0):j + 2] += rng.uniform(15, 25)
    if blur_px > 0:
        img = ndimage.gaussian_filter(img, blur_px)
    img = img + noise_k * rng.standard_normal(img.shape)
    return img.astype(np.float32), tr


def periodic_layout(origin, n_rows=14, pitch=4.0, n_cols=40, crs="EPSG:32633"):
    """A uniform array: rows of 2-high landscape tables, all the same length, row pitch 4 m."""
    polys = []
    for r in range(n_rows):
        for row in range(2):
            for c in range(n_cols):
                px, py = c * (MOD_L + 0.02), r * pitch + row * (MOD_W + 0.02)
                polys.append(shapely.box(px, py, px + MOD_L, py + MOD_W))
    g = gpd.GeoSeries(polys).translate(*origin)
    return gpd.GeoDataFrame({"module_id": [f"M{i:05d}" for i in range(len(polys))]},
                            geometry=g.values, crs=crs)


def run(orthos, modules, **settings):
    """estimate_shift with the default settings overridden, failing on any warning."""
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        return estimate_shift(orthos, modules, settings)


def err(reg, shift):
    return math.hypot(reg.measured_m[0] - shift[0], reg.measured_m[1] - shift[1])


# Tolerance: 5 cm = half the working pixel (0.1 m), a quarter of the zonal edge margin
# (0.04 x 2.09 m ~ 8 cm); the sub-pixel refinement steps are 0.5 cm.
TOL_M = 0.05


# ----------------------------------------------------------------------------------
# correlation core against independent computations
# ----------------------------------------------------------------------------------
def test_correlation_surface_equals_brute_force_circular_cross_correlation():
    # Reference: the definition c(s) = sum_r a(r) b(r - s), summed directly (no FFT).
    rng = np.random.default_rng(1)
    a = rng.standard_normal((9, 12))
    b = rng.standard_normal((9, 12))
    surf = correlation_surface(a, b, whitening=0.0)
    brute = np.empty_like(surf)
    for i in range(9):
        for j in range(12):
            brute[i, j] = np.sum(a * np.roll(b, (i, j), axis=(0, 1)))
    np.testing.assert_allclose(surf, brute, rtol=1e-10, atol=1e-10)


def test_phase_correlation_of_a_circular_shift_is_a_delta():
    # Kuglin & Hines (1975): the phase correlation of a circularly shifted copy is a unit
    # impulse at the shift.
    rng = np.random.default_rng(2)
    a = rng.standard_normal((32, 40))
    moved = np.roll(a, (5, -7), axis=(0, 1))
    surf = correlation_surface(moved, a, whitening=1.0)
    assert np.unravel_index(np.argmax(surf), surf.shape) == (5, 40 - 7)
    assert surf.max() == pytest.approx(1.0, abs=1e-9)
    assert np.sort(np.abs(surf.ravel()))[-2] < 1e-9


@pytest.mark.parametrize("true_shift", [(2.35, -1.7), (-0.45, 0.8), (0.0, 3.25)])
def test_subpixel_shift_agrees_with_scikit_image(true_shift):
    # Reference: skimage.registration.phase_cross_correlation (Guizar-Sicairos et al. 2008)
    # on a smooth image moved by an exact Fourier shift (scipy.ndimage.fourier_shift).
    from skimage.registration import phase_cross_correlation

    rng = np.random.default_rng(3)
    ref = ndimage.gaussian_filter(rng.standard_normal((96, 80)), 2.0)
    moved = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(ref), true_shift)).real
    peak = phase_correlate(moved, ref, max_shift_px=6, whitening=1.0, upsample=40)
    theirs, _, _ = phase_cross_correlation(ref, moved, upsample_factor=40, normalization="phase")
    # skimage returns the shift that registers `moved` onto `ref`: the negative of ours
    np.testing.assert_allclose(peak.shift, -np.asarray(theirs), atol=1.5 / 40)
    np.testing.assert_allclose(peak.shift, true_shift, atol=1.5 / 40)
    assert not peak.at_limit


def test_search_radius_excludes_a_stronger_peak_beyond_it():
    # The best match within the radius is returned even when a better one lies outside.
    rng = np.random.default_rng(4)
    a = ndimage.gaussian_filter(rng.standard_normal((64, 64)), 1.0)
    moved = np.roll(a, (20, 0), axis=(0, 1)) + 0.5 * np.roll(a, (2, 1), axis=(0, 1))
    far = phase_correlate(moved, a, max_shift_px=30, whitening=1.0)
    near = phase_correlate(moved, a, max_shift_px=5, whitening=1.0)
    assert far.shift == pytest.approx((20, 0), abs=0.1)
    assert near.shift == pytest.approx((2, 1), abs=0.1)


# ----------------------------------------------------------------------------------
# known shifts on drawn scenes
# Reference for every check below: the offset the scene was drawn with (render(), with
# sub-pixel coverage), independent of the estimator.
# ----------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "shift, angle, crs, origin",
    [
        ((0.37, -0.21), 0.0, "EPSG:32633", (500_000.0, 4_000_000.0)),    # sub-pixel-ish, UTM 33N
        ((0.033, 0.018), 0.0, "EPSG:32633", (500_000.0, 4_000_000.0)),   # below one work pixel
        ((1.5, -1.2), 17.0, "EPSG:32633", (431_250.0, 5_210_400.0)),     # rotated tables
        ((-1.45, 0.9), 90.0, "EPSG:32733", (612_300.0, 6_240_000.0)),    # UTM 33S, north-south rows
        ((0.8, 1.4), 133.0, "EPSG:32755", (320_000.0, 5_810_000.0)),     # UTM 55S, oblique
    ],
)
def test_recovers_known_shift(shift, angle, crs, origin):
    mods = make_layout(origin, angle_deg=angle, crs=crs)
    img, tr = render(mods, shift, seed=7)
    reg = run(ArrayOrthos([img], [tr], crs), mods)
    assert err(reg, shift) < TOL_M, reg.message
    assert reg.applied and reg.shift_m == reg.measured_m
    assert reg.confidence > 0.5
    assert reg.contrast == "edges"


def test_no_shift_invented_on_an_aligned_flight():
    mods = make_layout((500_000.0, 4_000_000.0), angle_deg=8.0)
    img, tr = render(mods, (0.0, 0.0), seed=11, ss=4)
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods)
    assert math.hypot(*reg.measured_m) < 0.01
    assert not reg.applied
    assert reg.shift_m == (0.0, 0.0)
    assert "not applied" in reg.message
    assert apply_shift(mods, reg).geometry.geom_equals_exact(mods.geometry, 0.0).all()


def test_noise_blur_and_hot_spots():
    mods = make_layout((500_000.0, 4_000_000.0), angle_deg=-25.0)
    shift = (-0.62, 1.13)
    img, tr = render(mods, shift, seed=12, blur_px=3.0, noise_k=1.0, hot_spots=60)
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods)
    assert err(reg, shift) < TOL_M, reg.message


@pytest.mark.parametrize("feature, contrast", [("gradient", "edges"), ("intensity", "cooler")])
def test_ground_warmer_than_glass(feature, contrast):
    mods = make_layout((500_000.0, 4_000_000.0))
    shift = (1.1, 0.45)
    img, tr = render(mods, shift, seed=13, t_ground=52.0)
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods, feature=feature)
    assert reg.contrast == contrast
    assert err(reg, shift) < TOL_M


def test_nodata_band_and_partial_cover():
    mods = make_layout((500_000.0, 4_000_000.0))
    shift = (0.55, -0.75)
    img, tr = render(mods, shift, seed=14)
    img[:, : img.shape[1] // 3] = np.nan          # a third of the ortho missing
    img[100:140, :] = np.nan                      # a stripe of nodata
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods)
    assert err(reg, shift) < TOL_M


def test_weak_structure_warns_and_applies_nothing():
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, (0.5, 0.5), seed=15)
    rng = np.random.default_rng(15)
    noise = (40.0 + rng.standard_normal(img.shape)).astype(np.float32)
    with pytest.warns(RegistrationWarning, match="layout registration"):
        reg = estimate_shift(ArrayOrthos([noise], [tr], "EPSG:32633"), mods, {})
    assert not reg.applied
    assert reg.shift_m == (0.0, 0.0)
    assert reg.confidence < 0.3
    with pytest.warns(RegistrationWarning):
        weak = estimate_shift(ArrayOrthos([noise], [tr], "EPSG:32633"), mods, {"apply_weak": True})
    assert weak.applied == (math.hypot(*weak.measured_m) >= 0.02)
    with pytest.raises(RegistrationError, match="require"):
        estimate_shift(ArrayOrthos([noise], [tr], "EPSG:32633"), mods, {"require": True})


@pytest.mark.parametrize("shift", [(4.4, 0.5), (-3.3, 3.6)])
def test_offset_beyond_the_search_radius_is_flagged_not_aliased(shift):
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, shift, seed=25)
    with pytest.warns(RegistrationWarning):
        reg = estimate_shift(ArrayOrthos([img], [tr], "EPSG:32633"), mods, {"max_shift_m": 3.0})
    assert not reg.applied and reg.shift_m == (0.0, 0.0)
    assert "beyond max_shift_m" in reg.blocks[0].note
    wide = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods, max_shift_m=6.0)
    assert err(wide, shift) < TOL_M


def test_flat_image_has_no_usable_block():
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, (0.0, 0.0), seed=16)
    flat = np.full_like(img, 41.0)
    with pytest.warns(RegistrationWarning, match="no usable ortho block"):
        reg = estimate_shift(ArrayOrthos([flat], [tr], "EPSG:32633"), mods, {})
    assert not reg.applied and reg.blocks[0].note == "no contrast"


def test_layout_in_another_crs_is_refused():
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, (0.0, 0.0), seed=27, gsd=0.1)
    with pytest.raises(RegistrationError, match="EPSG:32634"):
        estimate_shift(ArrayOrthos([img], [tr], "EPSG:32633"), mods.set_crs("EPSG:32634", allow_override=True))


def test_disabled():
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, (1.0, 0.0), seed=17)
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods, enabled=False)
    assert not reg.applied and reg.blocks == [] and "disabled" in reg.message


# ----------------------------------------------------------------------------------
# periodic rows, blocks, tiles, drift
# ----------------------------------------------------------------------------------
def test_periodic_rows_resolved_by_array_edges():
    # Row pitch 4 m inside a 3 m search radius: the shift minus one pitch is a candidate
    # in every block. Inner blocks see no array edge and are ambiguous; the edge blocks
    # decide, and the inner ones take the candidate nearest to their consensus.
    mods = periodic_layout((500_000.0, 4_000_000.0))
    shift = (0.2, 2.2)   # alias at (0.2, -1.8) inside the radius
    img, tr = render(mods, shift, seed=18, gsd=0.1)
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods, block_m=25.0)
    assert len(reg.blocks) >= 9
    assert any(b.candidates >= 2 for b in reg.blocks)
    assert any("periodic ambiguity" in b.note for b in reg.blocks)
    assert err(reg, shift) < TOL_M
    for b in reg.blocks:  # every block ends up on the true shift, none on the alias
        assert math.hypot(b.dx - shift[0], b.dy - shift[1]) < TOL_M


def test_multi_tile_overlap_and_empty_tile():
    mods = make_layout((500_000.0, 4_000_000.0))
    shift = (-0.9, -0.35)
    img, tr = render(mods, shift, seed=19)
    h, w = img.shape
    half = w // 2
    left, right = img[:, : half + 200], img[:, half - 200:]
    tr_right = tr @ Affine.translation(half - 200, 0)
    far = np.full((200, 200), 30.0, np.float32)           # a tile 1 km away: no module
    tr_far = tr @ Affine.translation(20_000, 0)
    orthos = ArrayOrthos([left, right, far], [tr, tr_right, tr_far], "EPSG:32633")
    reg = run(orthos, mods, block_m=40.0)
    assert {b.tile for b in reg.blocks if b.used} == {0, 1}
    assert any("tile 2" in n and "no layout module" in n for n in reg.notes)
    assert err(reg, shift) < TOL_M


def test_reads_are_windowed():
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, (0.3, 0.3), seed=20)
    orthos = ArrayOrthos([img], [tr], "EPSG:32633")
    run(orthos, mods, block_m=25.0)
    assert len(orthos.reads) >= 2 and max(h * w for _, h, w in orthos.reads) < 0.6 * img.size


def test_drift_rotation_is_measured_and_followed():
    # The ortho is rotated by 0.15 deg about the layout's centre and moved by (0.4, -0.3):
    # over the ~70 m extent the shift differs by ~0.18 m between the ends.
    mods = make_layout((500_000.0, 4_000_000.0), n_rows=6, lengths=(16, 20, 12, 18))
    rot, shift = 0.15, (0.4, -0.3)
    img, tr = render(mods, shift, seed=21, gsd=0.1, ss=2, rotate_deg=rot)
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods, block_m=25.0)
    assert reg.residual_rotation_deg == pytest.approx(rot, abs=0.02)
    assert reg.residual_scale == pytest.approx(1.0, abs=3e-4)
    b = mods.total_bounds
    cx, cy = (b[0] + b[2]) / 2, (b[1] + b[3]) / 2
    truth = mods.geometry.rotate(rot, origin=(cx, cy)).translate(*shift).centroid
    moved = apply_shift(mods, reg).centroid
    assert float(np.max(truth.distance(moved))) < TOL_M
    fixed = apply_shift(mods, reg.shift_m).centroid   # one shift for all is worse at the ends
    assert float(np.max(truth.distance(fixed))) > 2 * float(np.max(truth.distance(moved)))
    single = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods, block_m=25.0, follow_drift=False)
    same = apply_shift(mods, single).centroid
    np.testing.assert_allclose(shapely.get_x(same.to_numpy()) - shapely.get_x(mods.centroid.to_numpy()),
                               single.shift_m[0], atol=1e-9)


def test_outlier_block_rejected():
    # One block's image is replaced by a copy moved 1 m further: it is rejected.
    mods = make_layout((500_000.0, 4_000_000.0), n_rows=6, lengths=(16, 20, 12, 18))
    shift = (0.25, 0.6)
    img, tr = render(mods, shift, seed=22, gsd=0.1, ss=2)
    bad = np.roll(img, 10, axis=1)      # the same scene 1 m further east (0.1 m pixels)
    h, w = img.shape
    img[: h // 2 + 60, : w // 3 + 60] = bad[: h // 2 + 60, : w // 3 + 60]   # one block and its margin
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods, block_m=25.0)
    assert err(reg, shift) < TOL_M
    assert any("outlier" in b.note for b in reg.blocks)


# ----------------------------------------------------------------------------------
# apply_shift and records
# ----------------------------------------------------------------------------------
def test_apply_shift_moves_footprints_and_frame_origins():
    mods = make_layout((500_000.0, 4_000_000.0)).iloc[:5].copy()
    mods["fx0"] = [1.0, 2.0, 3.0, 4.0, 5.0]
    mods["fy0"] = 10.0
    mods["fux"] = 2.09
    before = mods.copy()
    out = apply_shift(mods, (0.5, -0.25))
    np.testing.assert_allclose(out["fx0"], before["fx0"] + 0.5)
    np.testing.assert_allclose(out["fy0"], before["fy0"] - 0.25)
    np.testing.assert_allclose(out["fux"], before["fux"])
    d = out.centroid.to_numpy()
    e = before.centroid.to_numpy()
    np.testing.assert_allclose(shapely.get_x(d) - shapely.get_x(e), 0.5, atol=1e-9)
    np.testing.assert_allclose(shapely.get_y(d) - shapely.get_y(e), -0.25, atol=1e-9)
    assert out.crs == mods.crs
    assert mods.geometry.geom_equals_exact(before.geometry, 0.0).all()     # input untouched
    assert list(out["module_id"]) == list(mods["module_id"])
    unapplied = Registration(measured_m=(0.3, 0.3), applied=False)
    assert apply_shift(mods, unapplied).geometry.geom_equals_exact(mods.geometry, 0.0).all()


def test_registration_record_is_plain_json():
    import json

    mods = make_layout((500_000.0, 4_000_000.0))
    shift = (0.7, 0.2)
    img, tr = render(mods, shift, seed=23)
    reg = run(ArrayOrthos([img], [tr], "EPSG:32633"), mods)
    d = json.loads(json.dumps(reg.to_dict()))
    assert d["applied"] is True
    assert d["layout_shift_m"] == pytest.approx(list(shift), abs=TOL_M)
    assert d["blocks"] and {"x", "y", "dx_m", "dy_m", "confidence"} <= set(d["blocks"][0])


def test_progress_reports_every_block():
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, (0.2, 0.1), seed=24)
    calls = []
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        estimate_shift(ArrayOrthos([img], [tr], "EPSG:32633"), mods, {"block_m": 25.0},
                       progress=lambda s, d, t: calls.append((s, d, t)))
    assert calls and calls[-1][1] == calls[-1][2] and {c[0] for c in calls} == {"register"}


def test_register_settings_schema():
    from pvscan.errors import PipelineError
    from pvscan.io.settings import load_pipeline

    pipe = load_pipeline()
    assert pipe["register"]["max_shift_m"] == 3.0
    with pytest.raises(PipelineError, match="register"):
        pipe.replace(register={"max_shift_mm": 3})
    with pytest.raises(PipelineError, match="register"):
        pipe.replace(register={"whitening": 1.5})
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, (0.0, 0.0), seed=26, gsd=0.1)
    with pytest.raises(PipelineError, match="register.max_shift_mm"):
        estimate_shift(ArrayOrthos([img], [tr], "EPSG:32633"), mods, {"max_shift_mm": 3})
    reg = estimate_shift(ArrayOrthos([img], [tr], "EPSG:32633"), mods, pipe)   # a whole pipeline works too
    assert not reg.applied


# ----------------------------------------------------------------------------------
# simulated flights (pvscan.simulate): realistic scenes with shadows, frames, tiles
# Reference: the layout offset the simulator drew the layout with (truth.json); the
# simulator renders the plant with its own optics (PSF, NETD) and radiometry.
# ----------------------------------------------------------------------------------
def _simulate(tmp_path_factory, name, **scenario):
    from pvscan.simulate import simulate_flight

    sc = {"site": {"name": "Register test plant", "lon": 8.1, "lat": 47.3},
          "array": {"table_rows": 3, "tables_per_row": 2}}
    for k, v in scenario.items():
        sc[k] = {**sc.get(k, {}), **v}
    seed = sc.pop("seed", {}).get("value", 6)
    return simulate_flight(sc, tmp_path_factory.mktemp(name) / "flight", seed=seed)


def _register_simulated(res, **settings):
    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight
    from pvscan.io.ortho import open_orthos

    fl = load_flight(res.manifest)
    with open_orthos(fl.flight.orthos, fl.ortho) as orthos:
        modules = read_layout(fl, orthos.crs)
        with warnings.catch_warnings():
            warnings.simplefilter("error", RegistrationWarning)
            reg = estimate_shift(orthos, modules, settings)
    return reg, modules


def _drawn_offset(res):
    import json

    return json.loads(res.truth_json.read_text())["layout_offset_m"]


@pytest.mark.parametrize(
    "name, scenario",
    [
        # southern winter morning: long shadows on ground warmer than the glass
        ("shadows_south", {"site": {"lat": -33.9}, "ground": {"sun_rise_k": 30.0},
                           "layout": {"offset_m": [-0.35, 0.9]}}),
        ("tiles_rotated", {"array": {"table_rows": 4, "tables_per_row": 3, "rotation_deg": 20.0},
                           "ortho": {"tiles": [2, 2]}, "layout": {"offset_m": [-1.3, 1.1]}}),
        ("distractors", {"distractors": {"cloud_shadows": 2, "reflections": 3, "seams": 2, "hot_objects": 3},
                         "defects": {"hot_cell": 4, "bypassed_substring": 2, "open_module": 1},
                         "layout": {"offset_m": [0.45, 1.45]}}),
    ],
)
def test_simulated_flight_offset_recovered(tmp_path_factory, name, scenario):
    res = _simulate(tmp_path_factory, name, **scenario)
    off = _drawn_offset(res)           # the layout was drawn off by this; the fit undoes it
    reg, _ = _register_simulated(res)
    assert reg.applied
    assert math.hypot(reg.shift_m[0] + off[0], reg.shift_m[1] + off[1]) < TOL_M, reg.message


def test_simulated_aligned_flight_not_shifted(tmp_path_factory):
    res = _simulate(tmp_path_factory, "aligned", layout={"offset_m": [0.0, 0.0]})
    reg, _ = _register_simulated(res)
    assert math.hypot(*reg.measured_m) < 0.015
    assert not reg.applied and reg.shift_m == (0.0, 0.0)


def test_align_command_writes_the_moved_layout(tmp_path_factory):
    from click.testing import CliRunner

    from pvscan.cli.main import cli

    res = _simulate(tmp_path_factory, "cli", layout={"offset_m": [0.6, -0.8]})
    out = res.out_dir.parent / "corrected_layout.gpkg"
    runner = CliRunner()
    r = runner.invoke(cli, ["align", str(res.manifest), "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert "measured shift" in r.output and "block" in r.output
    moved = gpd.read_file(out, layer="modules")
    _, drawn = _register_simulated(res)
    assert list(moved["module_id"]) == list(drawn["module_id"])
    assert "table_id" in moved.columns and not {"fx0", "fy0", "fux"} & set(moved.columns)
    d = moved.geometry.centroid.to_numpy()
    e = drawn.geometry.centroid.to_numpy()
    np.testing.assert_allclose(shapely.get_x(d) - shapely.get_x(e), -0.6, atol=TOL_M)
    np.testing.assert_allclose(shapely.get_y(d) - shapely.get_y(e), 0.8, atol=TOL_M)
    # an existing output is kept unless --overwrite
    again = runner.invoke(cli, ["align", str(res.manifest), "--out", str(out)])
    assert again.exit_code == 1
    assert "exists" in again.output and "Traceback" not in again.output
    assert runner.invoke(cli, ["align", str(res.manifest), "--out", str(out), "--overwrite"]).exit_code == 0
    assert not [p for p in out.parent.iterdir() if p.name.endswith(".tmp.gpkg")]
    # GeoJSON too (RFC 7946, lon/lat), same modules where the GeoPackage has them
    gj = runner.invoke(cli, ["align", str(res.manifest), "--out", str(out.with_suffix(".geojson"))])
    assert gj.exit_code == 0, gj.output
    moved_gj = gpd.read_file(out.with_suffix(".geojson")).to_crs(moved.crs)
    assert list(moved_gj["module_id"]) == list(moved["module_id"]) and "fx0" not in moved_gj.columns
    np.testing.assert_allclose(shapely.get_x(moved_gj.geometry.centroid.to_numpy()), shapely.get_x(d), atol=1e-3)
    bad = runner.invoke(cli, ["align", str(res.manifest), "--out", str(out.with_suffix(".txt"))])
    assert bad.exit_code == 1 and "GeoPackage" in bad.output
    tuned = out.parent / "tuned.toml"
    tuned.write_text("[register]\nmax_shift_mm = 2.0\n")
    typo = runner.invoke(cli, ["align", str(res.manifest), "--out", str(out.parent / "x.gpkg"),
                               "--pipeline", str(tuned)])
    assert typo.exit_code == 1 and "max_shift_mm" in typo.output and "Traceback" not in typo.output
    assert not (out.parent / "x.gpkg").exists()


def test_footprint_mappings_rasterise_like_the_geometries():
    # The vectorised GeoJSON mappings must burn exactly the pixels rasterio burns for the
    # shapely geometries themselves (reference: rasterio.features.rasterize).
    from pvscan.measure.register import _as_mappings

    mods = make_layout((500_000.0, 4_000_000.0), angle_deg=23.0)
    holed = shapely.box(500_000.0, 4_000_000.0, 500_006.0, 4_000_006.0).difference(
        shapely.box(500_002.0, 4_000_002.0, 500_004.0, 4_000_004.0))
    geoms = list(mods.geometry.values[:50]) + [holed]
    b = shapely.total_bounds(np.array(geoms, dtype=object))
    tr = Affine(0.05, 0, b[0] - 1, 0, -0.05, b[3] + 1)
    shape = (int((b[3] - b[1] + 2) / 0.05), int((b[2] - b[0] + 2) / 0.05))
    ref = features.rasterize(((g, 1) for g in geoms), out_shape=shape, transform=tr, dtype="uint8")
    ours = features.rasterize(((g, 1) for g in _as_mappings(geoms)), out_shape=shape, transform=tr,
                              dtype="uint8")
    assert ref.sum() > 1000
    np.testing.assert_array_equal(ours, ref)


@pytest.mark.parametrize("ss", [1, 3, 4, 16])
def test_footprint_coverage_counts_the_burnt_samples_of_each_pixel(ss):
    # Reference: rasterio.features.rasterize on the ss-times finer grid (a sample burns when
    # its centre lies inside a footprint), its samples counted per pixel by plain numpy sums:
    # the coverage must be that count times 1 / (ss * ss), exactly, whatever the summing order.
    from pvscan.measure.register._blocks import _coverage

    mods = make_layout((500_000.0, 4_000_000.0), angle_deg=17.0)
    geoms = np.asarray(mods.geometry.values[:40], dtype=object)
    b = shapely.total_bounds(geoms)
    gsd = 0.1
    tr = Affine(gsd, 0, b[0] - 0.73, 0, -gsd, b[3] + 0.41)
    shape = (int((b[3] - b[1] + 1.5) / gsd), int((b[2] - b[0] + 1.5) / gsd))
    fine = features.rasterize(((g, 1) for g in geoms), out_shape=(shape[0] * ss, shape[1] * ss),
                              transform=tr @ Affine.scale(1.0 / ss), dtype="uint8")
    want = fine.reshape(shape[0], ss, shape[1], ss).sum(axis=(1, 3)) * (1.0 / (ss * ss))
    got = _coverage(geoms, shape, tr, ss)
    assert got.shape == shape and 0.0 < got.mean() < 1.0 and ((got > 0) & (got < 1)).any() == (ss > 1)
    np.testing.assert_array_equal(got, want)


# ----------------------------------------------------------------------------------
# physical plausibility: tracker rows beside their own ground shadow
# A row's shadow on the ground is as wide as the row and uniform, so the edge
# correlation can prefer it to the row; the glass temperature tells them apart.
# References: module temperature by pvlib.temperature.faiman (Faiman 2008, Prog.
# Photovolt. 16:307), turned into what the export reports by pvscan.physics.radiometry
# (Planck band radiance, checked against CODATA in tests/test_radiometry.py); a shaded
# ground strip near air temperature is common practice.
# ----------------------------------------------------------------------------------
T_AIR, G_POA, WIND = 30.0, 900.0, 3.0
RADIOMETRY = {"emissivity": 0.85, "temp_sky_c": -12.0, "export_emissivity": 1.0, "export_reflected_c": 20.0}


def _glass_apparent_c():
    import pvlib

    from pvscan.physics.radiometry import apparent_from_true

    t_true = float(pvlib.temperature.faiman(G_POA, T_AIR, WIND))
    return float(apparent_from_true(t_true, **RADIOMETRY))


def tracker_rows(origin, n_rows=5, pitch=6.0, n_mod=24, crs="EPSG:32633"):
    """Single-axis tracker rows running north-south, one module in portrait across (the
    long side east-west), 0.02 m gaps along the row."""
    polys = []
    for r in range(n_rows):
        for c in range(n_mod):
            px, py = r * pitch, c * (MOD_W + 0.02)
            polys.append(shapely.box(px, py, px + MOD_L, py + MOD_W))
    g = gpd.GeoSeries(polys).translate(*origin)
    return gpd.GeoDataFrame({"module_id": [f"M{i:04d}" for i in range(len(polys))]}, geometry=g.values, crs=crs)


def render_tracker(modules, shift, t_glass, t_ground, t_shadow, gsd=0.05, pad=6.0, seed=0, noise_k=0.3):
    """Rows of glass (frames 1 K cooler) with a shadow strip of the row's own width
    immediately west of each row, over textured sunlit ground; layout moved by ``shift``."""
    rng = np.random.default_rng(seed)
    moved = modules.geometry.translate(*shift)
    rows = shapely.union_all(np.asarray(moved.values, dtype=object)).buffer(0.015).buffer(-0.015)
    rows = list(getattr(rows, "geoms", [rows]))
    shadows = [shapely.affinity.translate(shapely.envelope(r), -(r.bounds[2] - r.bounds[0]), 0.0) for r in rows]
    x0, b, r, t = moved.total_bounds + np.array([-pad, -pad, pad, pad])
    w, h = int(math.ceil((r - x0) / gsd)), int(math.ceil((t - b) / gsd))
    tr = Affine(gsd, 0, x0, 0, -gsd, t)
    ss = 2
    fine = tr @ Affine.scale(1 / ss)
    shape = (h * ss, w * ss)
    step = max(1, int(round(1.0 / gsd)))
    coarse = ndimage.gaussian_filter(rng.standard_normal((h // step + 2, w // step + 2)), 2.0)
    ground = t_ground + 0.8 * ndimage.zoom(coarse / coarse.std(), step, order=1)[:h, :w]
    img = np.repeat(np.repeat(ground, ss, 0), ss, 1)
    sh = features.rasterize(((s, 1) for s in shadows), out_shape=shape, transform=fine, dtype="uint8")
    img = np.where(sh > 0, t_shadow, img)
    temps = t_glass + 0.5 * rng.standard_normal(len(moved))
    glass = features.rasterize(((p, v) for p, v in zip(moved, temps)), out_shape=shape, transform=fine,
                               fill=np.nan, dtype="float32")
    frames = features.rasterize(((p.exterior.buffer(0.03), 1) for p in moved), out_shape=shape,
                                transform=fine, dtype="uint8")
    img = np.where(np.isnan(glass), img, glass - 1.0 * frames)
    img = img.reshape(h, ss, w, ss).mean(axis=(1, 3))
    img = ndimage.gaussian_filter(img, 1.0) + noise_k * rng.standard_normal((h, w))
    return img.astype(np.float32), tr


def _tracker_scene(shift, seed):
    mods = tracker_rows((500_000.0, 4_000_000.0))
    glass = _glass_apparent_c()
    # glass a little warmer than the sunlit ground, the shadow near air temperature: the
    # row/shadow and shadow/ground edges are strong, the glass/ground edge weak
    img, tr = render_tracker(mods, shift, glass, glass - 3.0, T_AIR, seed=seed)
    return ArrayOrthos([img], [tr], "EPSG:32633"), mods, glass


@pytest.mark.parametrize("shift, seed", [((0.0, 0.0), 41), ((0.8, 0.0), 42), ((-0.6, 0.45), 43)])
def test_tracker_rows_are_not_taken_for_their_shadow(shift, seed):
    orthos, mods, glass = _tracker_scene(shift, seed)
    shadow = (shift[0] - MOD_L, shift[1])       # the footprints laid onto the shadow strip
    plain = run(orthos, mods)
    assert err(plain, shadow) < TOL_M, plain.message          # the edge correlation alone fails
    # the expectation of the glass, off by 2 K (the Faiman model's own accuracy, from memory)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        reg = estimate_shift(orthos, mods, {}, expected_apparent_c=glass + 2.0)
    assert err(reg, shift) < TOL_M, reg.message
    assert math.hypot(reg.shift_m[0] - shift[0], reg.shift_m[1] - shift[1]) < TOL_M   # applied or below min_shift_m
    assert any("taken instead" in n for n in reg.notes), reg.notes
    # switched off, the correlation's choice stands
    off = estimate_shift(orthos, mods, {"plausibility": False}, expected_apparent_c=glass)
    assert err(off, shadow) < TOL_M
    # an expectation nothing in the image meets (20 K too warm) moves nothing
    wrong = estimate_shift(orthos, mods, {}, expected_apparent_c=glass + 20.0)
    assert err(wrong, shadow) < TOL_M
    assert any("fit kept" in n for n in wrong.notes), wrong.notes


def test_plausibility_keeps_a_correct_fit():
    # an ordinary fixed-tilt scene: the fit puts the footprints on glass, which reads
    # the expected temperature, so no other candidate replaces it
    mods = make_layout((500_000.0, 4_000_000.0))
    img, tr = render(mods, (0.7, -0.4), seed=44, t_module=45.0, t_ground=38.0)
    orthos = ArrayOrthos([img], [tr], "EPSG:32633")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        reg = estimate_shift(orthos, mods, {}, expected_apparent_c=44.0)
    assert err(reg, (0.7, -0.4)) < TOL_M
    assert not any("taken instead" in n for n in reg.notes)


def test_expected_module_apparent_temperature_follows_faiman(tmp_path_factory):
    # Reference: pvlib.temperature.faiman at the manifest's constants; the apparent
    # value, converted back by radiometry.true_from_apparent with the flight's keywords,
    # must give the Faiman temperature (the pair is an exact inverse, tolerance 0.01 K).
    import pandas as pd
    import pvlib

    from pvscan.io.manifest import load_flight
    from pvscan.measure.register import expected_module_apparent_c
    from pvscan.physics import radiometry

    res = _simulate(tmp_path_factory, "expected_t", conditions={"poa_irradiance_w_m2": 820.0, "ambient_c": 24.0,
                                                                "wind_m_s": 2.5})
    fl = load_flight(res.manifest)
    t_app = expected_module_apparent_c(fl)
    c = fl.conditions
    cond = pd.DataFrame({"temp_air": [c.ambient_c], "temp_sky": [c.sky_c],
                         "relative_humidity": [c.relative_humidity_pct]})
    kw = radiometry.flight_radiometry(fl, cond)
    t_true = float(np.asarray(radiometry.true_from_apparent(t_app, **kw)).reshape(-1)[0])
    assert t_true == pytest.approx(float(pvlib.temperature.faiman(820.0, 24.0, 2.5)), abs=0.01)
    # glass emits less than a black body and reflects a cold sky: it reads cooler than it is
    assert t_app < t_true
    # a flight without irradiance: an error, or NaN (plausibility test off) when not strict
    import dataclasses

    from pvscan.errors import ConditionsError

    bare = dataclasses.replace(fl, conditions=dataclasses.replace(c, poa_irradiance_w_m2=None, series=None))
    with pytest.raises(ConditionsError):
        expected_module_apparent_c(bare)
    assert math.isnan(expected_module_apparent_c(bare, strict=False))


def test_simulated_tracker_rows_registered_on_the_glass(tmp_path_factory):
    # Simulated single-axis trackers facing east at 30 deg, 900 W/m2 (pvscan.simulate
    # renders the rows, their ground shadows and the camera); the layout was drawn in
    # place (truth.json offset 0). Tolerance 0.1 m (one working pixel): the simulator's
    # glass edge and frame line sit a few centimetres off the drawn outline, while the
    # shadow lies a row width (1.8 m) away.
    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight
    from pvscan.io.ortho import open_orthos

    res = _simulate(tmp_path_factory, "trackers_east",
                    site={"lon": -5.9, "lat": 37.4},
                    conditions={"poa_irradiance_w_m2": 900.0, "wind_m_s": 3.0, "ambient_c": 30.0},
                    array={"kind": "tracker", "tilt_deg": 30, "facing": "east", "rows": 1, "cols": 14,
                           "modules_per_string": 7, "table_rows": 3, "tables_per_row": 2},
                    layout={"offset_m": [0.0, 0.0]})
    off = _drawn_offset(res)
    fl = load_flight(res.manifest)
    with open_orthos(fl.flight.orthos, fl.ortho) as orthos:
        modules = read_layout(fl, orthos.crs)
        with warnings.catch_warnings():
            warnings.simplefilter("error", RegistrationWarning)
            plain = estimate_shift(orthos, modules, {})
            reg = estimate_shift(orthos, modules, {}, flight=fl)
    width = float(np.median(modules.geometry.bounds["maxx"] - modules.geometry.bounds["minx"]))
    assert abs(abs(plain.measured_m[0] + off[0]) - width) < 0.1     # the shadow, a row width off
    assert math.hypot(reg.measured_m[0] + off[0], reg.measured_m[1] + off[1]) < 0.1, reg.message


def test_block_cache_reuses_equal_windows_with_the_same_result():
    # Reference: the offset the scene was drawn with (render()), and the same estimate made
    # without the cache. Two block sizes that cut this site into one block each give the
    # same window: the second pass reads nothing and analyses nothing again; a block size
    # giving other windows analyses its own blocks.
    rng = np.random.default_rng(test_seed(181))
    shift = (float(rng.uniform(-1.2, 1.2)), float(rng.uniform(-1.2, 1.2)))
    mods = make_layout((500_000.0, 4_000_000.0), angle_deg=float(rng.uniform(-20.0, 20.0)))
    img, tr = render(mods, shift, seed=test_seed(182))
    cache: dict = {}
    orthos = ArrayOrthos([img], [tr], "EPSG:32633")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        first = estimate_shift(orthos, mods, {"block_m": 150.0}, block_cache=cache)
        n_reads, n_blocks = len(orthos.reads), len(cache)
        again = estimate_shift(orthos, mods, {"block_m": 120.0}, block_cache=cache)
        assert len(orthos.reads) == n_reads and len(cache) == n_blocks == 1
        fresh = estimate_shift(ArrayOrthos([img], [tr], "EPSG:32633"), mods, {"block_m": 120.0})
        assert again.to_dict() == fresh.to_dict()
        assert err(first, shift) < TOL_M and err(again, shift) < TOL_M
        small = estimate_shift(orthos, mods, {"block_m": 20.0}, block_cache=cache)
        assert len(cache) > n_blocks and len(orthos.reads) > n_reads
        assert small.to_dict() == estimate_shift(ArrayOrthos([img], [tr], "EPSG:32633"), mods,
                                                 {"block_m": 20.0}).to_dict()
        assert err(small, shift) < TOL_M
