"""The simulator's shadows, terrain, relief displacement, vignetting and seams against outside
references and independent calculations.

Sources named beside each check: pvlib.shading.shaded_fraction1d (Anderson & Jensen 2024,
the 1-D row-to-row shade of pvlib), pvlib.shading.projected_solar_zenith_angle,
pvlib.irradiance (angle of incidence, beam component, isotropic sky diffuse), the relief
displacement of a vertical photograph ``d = r h / H`` (photogrammetry textbooks, e.g. Wolf,
Dewitt & Wilkinson, Elements of Photogrammetry; from memory) checked by a 3-D ray
construction, and the cosine-fourth law of off-axis irradiance (radiometric optics
textbooks, from memory).
"""
from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from conftest import test_seed

from pvscan.simulate import build_scene, radiance
from pvscan.simulate.optics import relief_source
from pvscan.simulate.shading import ground_beam_factor, shadow_geometry, terrain_grades

SEED = test_seed()


def _rows(tilt_deg, depth_slant, pitch, facing_az=180.0, n_trows=3):
    """A field-like object of long east-west rows (tables 400 m long)."""
    phi = math.radians(facing_az)
    depth = depth_slant * math.cos(math.radians(tilt_deg))
    return SimpleNamespace(tilt_deg=tilt_deg, table_depth=depth, a=np.array([-math.cos(phi), math.sin(phi)]),
                           c=np.array([math.sin(phi), math.cos(phi)]), pitch=pitch, table_step=401.0,
                           table_len=400.0, n_trows=n_trows, n_tables=1)


def _shaded_fraction_of_back_row(geo, fld, n=4000):
    """Fraction of the slant width of row 1 (middle of the table) in the shadow of row 0."""
    w = fld.pitch + (np.arange(n) + 0.5) / n * fld.table_depth
    s = np.full(n, 200.0)
    z = geo.table_z(s, w)
    return float(np.mean(geo.shaded(s, w, z, own_row=np.ones(n, np.int64))))


def test_row_to_row_shade_matches_pvlib_on_level_ground():
    # pvlib.shading.shaded_fraction1d, south-facing fixed rows (axis_azimuth 90, rotation = tilt):
    # the shaded share of the back row's slant width; 0.005 (sampling of 4000 points).
    from pvlib.shading import shaded_fraction1d

    rng = np.random.default_rng(SEED)
    checked = 0
    for _ in range(12):
        tilt = rng.uniform(10.0, 35.0)
        width = rng.uniform(2.0, 4.5)
        pitch = width * math.cos(math.radians(tilt)) * rng.uniform(1.3, 2.6)
        elev = rng.uniform(8.0, 35.0)
        az = 180.0 + rng.uniform(-60.0, 60.0)
        fld = _rows(tilt, width, pitch)
        geo = shadow_geometry(fld, elev, az, mount_height_m=rng.uniform(0.3, 1.5))
        ref = float(shaded_fraction1d(90.0 - elev, az, 90.0, tilt, collector_width=width, pitch=pitch))
        got = _shaded_fraction_of_back_row(geo, fld)
        assert got == pytest.approx(ref, abs=5e-3)
        checked += ref > 0.02
    assert checked >= 1  # the draw reaches real shade (low sun in front of the rows)


def test_row_to_row_shade_on_a_cross_slope_matches_pvlib():
    # pvlib.shading.shaded_fraction1d with cross_axis_slope (right-handed about the east-pointing
    # axis: positive = terrain rising toward the back, north); terrain_grades gives the same
    # grade; 0.005. A slope rising toward the back shades less than level ground.
    from pvlib.shading import shaded_fraction1d

    rng = np.random.default_rng(SEED + 1)
    for _ in range(8):
        tilt, width = rng.uniform(15.0, 30.0), rng.uniform(2.0, 4.0)
        pitch = width * math.cos(math.radians(tilt)) * rng.uniform(1.4, 2.0)
        elev, az = rng.uniform(10.0, 25.0), 180.0 + rng.uniform(-30.0, 30.0)
        slope = rng.uniform(1.0, 8.0)
        aspect = 180.0 if rng.uniform() < 0.5 else 0.0  # downhill south (rising back) or north
        fld = _rows(tilt, width, pitch)
        geo = shadow_geometry(fld, elev, az, 0.8, slope_deg=slope, aspect_deg=aspect)
        cross = math.degrees(math.atan(terrain_grades(slope, aspect, fld.a, fld.c)[1]))
        assert cross == pytest.approx(slope if aspect == 180.0 else -slope, abs=1e-9)
        ref = float(shaded_fraction1d(90.0 - elev, az, 90.0, tilt, collector_width=width, pitch=pitch,
                                      cross_axis_slope=cross))
        assert _shaded_fraction_of_back_row(geo, fld) == pytest.approx(ref, abs=5e-3)
        level = float(shaded_fraction1d(90.0 - elev, az, 90.0, tilt, collector_width=width, pitch=pitch))
        assert (ref <= level + 1e-9) if aspect == 180.0 else (ref >= level - 1e-9)


def test_ground_shadow_reaches_the_projected_length():
    # pvlib.shading.projected_solar_zenith_angle: a point h metres high throws its shadow
    # h * tan(projected zenith) across the row on level ground; the shadow of a lone row ends
    # there (within 2 cm of sampling).
    from pvlib.shading import projected_solar_zenith_angle

    rng = np.random.default_rng(SEED + 2)
    for _ in range(6):
        tilt, width, h0 = rng.uniform(10.0, 35.0), rng.uniform(2.0, 4.0), rng.uniform(0.5, 1.5)
        elev, az = rng.uniform(15.0, 60.0), 180.0 + rng.uniform(-50.0, 50.0)
        fld = _rows(tilt, width, 100.0, n_trows=1)
        geo = shadow_geometry(fld, elev, az, h0)
        psza = float(projected_solar_zenith_angle(90.0 - elev, az, axis_tilt=0.0, axis_azimuth=90.0))
        # the top edge (at w = depth, height h_high) casts toward the north (+w)
        tip = fld.table_depth + geo.h_high * math.tan(math.radians(abs(psza)))
        w = np.arange(0.0, 30.0, 0.005)
        sh = geo.shaded(np.full(w.size, 200.0), w, np.zeros(w.size))
        assert w[sh].max() == pytest.approx(tip, abs=0.02)
        assert sh[w < fld.table_depth].all()  # ground under the table


def test_sloping_ground_gets_the_beam_of_its_angle_of_incidence():
    # pvlib.irradiance.aoi / beam_component / isotropic: irradiance on the slope over that on
    # level ground, with a diffuse share d of the global; 1e-9.
    import pvlib

    rng = np.random.default_rng(SEED + 3)
    for _ in range(10):
        slope, aspect = rng.uniform(0.0, 15.0), rng.uniform(0.0, 360.0)
        elev, az, d = rng.uniform(15.0, 70.0), rng.uniform(60.0, 300.0), rng.uniform(0.1, 0.3)
        zen = 90.0 - elev
        ghi = 1000.0
        dni = (1 - d) * ghi / math.cos(math.radians(zen))
        beam = float(pvlib.irradiance.beam_component(slope, aspect, zen, az, dni))
        sky = float(pvlib.irradiance.isotropic(slope, d * ghi))
        assert ground_beam_factor(slope, aspect, elev, az, d) == pytest.approx((beam + sky) / ghi, rel=1e-9)


def test_relief_displacement_follows_the_ray():
    # 3-D ray construction: camera at (N, H); a surface point Q at height h is seen where the
    # ray through it meets the ground, P = C + (Q - C) H / (H - h); relief_source maps P back
    # to Q, and |P - Q| = r_P h / H (textbook relief displacement, r_P measured to P); 1 mm.
    rng = np.random.default_rng(SEED + 4)
    H = rng.uniform(25.0, 80.0)
    gx, gy = np.meshgrid(np.arange(-24.0, 25.0, 8.0), np.arange(-24.0, 25.0, 8.0))
    qx, qy = gx.ravel() + rng.uniform(-1, 1, gx.size), gy.ravel() + rng.uniform(-1, 1, gx.size)
    n = qx.size
    nx, ny = rng.uniform(-5, 5, n), rng.uniform(-5, 5, n)
    h = rng.uniform(0.5, 3.0, n)
    cam = np.stack([nx, ny, np.full(n, H)], axis=1)
    q = np.stack([qx, qy, h], axis=1)
    p = cam + (q - cam) * (H / (H - h))[:, None]
    assert np.allclose(p[:, 2], 0.0, atol=1e-9)

    def height(x, y):  # a flat roof of height h_k on a 2 m disc around each Q_k (discs 4 m apart or more)
        near = np.hypot(x[:, None] - qx[None], y[:, None] - qy[None]) < 2.0
        return (near * h[None]).max(axis=1)

    sx, sy, sh = relief_source(p[:, 0], p[:, 1], nx, ny, height, H, starts=(3.0, 2.0, 1.0))
    assert np.allclose(sx, qx, atol=1e-3) and np.allclose(sy, qy, atol=1e-3) and np.allclose(sh, h)
    r_p = np.hypot(p[:, 0] - nx, p[:, 1] - ny)
    assert np.allclose(np.hypot(p[:, 0] - qx, p[:, 1] - qy), r_p * h / H, atol=1e-6)


def _scene(**over):
    sc = {"site": {"lon": 8.1, "lat": 47.3}, "array": {"table_rows": 2, "tables_per_row": 1, "cols": 8},
          "camera": {"psf_sigma_px": 0.0, "netd_k": 0.0}, "ortho": {"nodata_border_m": 0.0},
          "defects": {"hot_cell": 1}}
    for k, v in over.items():
        sc.setdefault(k, {}).update(v)
    return build_scene(sc, SEED % 1000)


def test_rendered_relief_displacement_puts_table_points_where_the_rays_meet_the_ground():
    # The same ray construction on a whole scene: for module centres Q (table height h(Q)),
    # the ortho pixel P = N + (Q - N) H / (H - h) of the frame kept there shows Q; 1 mm.
    scene = _scene(ortho={"relief_height_fraction": 1.0})
    m = scene.field.modules
    n_checked = 0
    for i in range(scene.field.n_modules):
        qx, qy = m["cx"][i], m["cy"][i]
        h = float(scene.raised_height(np.array([qx]), np.array([qy]))[0])
        nx, ny = (float(a[0]) for a in scene.frames.nadir(np.array([qx]), np.array([qy])))
        H = scene.altitude_m
        px, py = nx + (qx - nx) * H / (H - h), ny + (qy - ny) * H / (H - h)
        kx, ky = (float(a[0]) for a in scene.frames.nadir(np.array([px]), np.array([py])))
        if (kx, ky) != (nx, ny):
            continue  # P falls in another frame's part of the mosaic
        sx, sy = scene._seen_points(0, 0, np.array([[px]]), np.array([[py]]))
        assert float(sx[0, 0]) == pytest.approx(qx, abs=1e-3) and float(sy[0, 0]) == pytest.approx(qy, abs=1e-3)
        n_checked += 1
    assert n_checked >= scene.field.n_modules // 2


@pytest.mark.parametrize("fraction", [1.0, 0.3])
def test_truth_ortho_polygons_are_where_the_ortho_shows_the_modules(fraction):
    # truth_ortho.geojson holds the modules as they stand in the ortho: with relief
    # displacement, every point inside a module's written polygon (bilinear in its corners,
    # u, v in 0.1..0.9) is an ortho pixel whose ray (the renderer's relief_source, the textbook
    # d = r h / H) meets that same module. Checked on the modules whose corners lie in one
    # frame's part of the mosaic (a frame border cuts or doubles a module there); the
    # undisplaced footprints fail the same check on raised tables (so the check can fail).
    from pvscan.simulate.writers import ortho_corners

    scene = _scene(ortho={"relief_height_fraction": fraction}, array={"mount_height_m": 1.5, "tilt_deg": 30.0},
                   distractors={"seams": 0})
    fld = scene.field
    shown = ortho_corners(scene)
    true = np.asarray(fld.modules["corners"], float)
    uu, vv = np.meshgrid(np.linspace(0.1, 0.9, 9), np.linspace(0.1, 0.9, 9))
    uu, vv = uu.ravel(), vv.ravel()

    def inside_share(corners, i):
        c = corners[i]  # corners 0-1-2-3 around the module
        p = ((1 - uu)[:, None] * (1 - vv)[:, None] * c[0] + uu[:, None] * (1 - vv)[:, None] * c[1]
             + uu[:, None] * vv[:, None] * c[2] + (1 - uu)[:, None] * vv[:, None] * c[3])
        sx, sy = scene._seen_points(0, 0, p[:, 0][None, :], p[:, 1][None, :])
        idx = fld.locate(sx.ravel(), sy.ravel())[0]
        return float(np.mean(idx == i))

    nx, ny = scene.frames.nadir(shown[..., 0], shown[..., 1])
    one_frame = [i for i in range(fld.n_modules) if np.ptp(nx[i]) == 0.0 and np.ptp(ny[i]) == 0.0]
    assert len(one_frame) >= fld.n_modules // 3
    moved = np.max(np.hypot(*(shown - true).transpose(2, 0, 1)), axis=1)
    assert np.median(moved) > 0.1 * fraction  # the tables stand 1.5-2.6 m high
    written = [inside_share(shown, i) for i in one_frame]
    assert min(written) == 1.0
    drawn = [inside_share(true, i) for i in one_frame]
    assert np.mean(drawn) < 0.995


@pytest.mark.parametrize("angle_deg", [0.0, 180.0, 30.0, 117.0])
@pytest.mark.parametrize("sigma_px,trail_px", [(0.6, 0.8), (0.8, 2.5), (1.0, 0.3)])
def test_blurred_edge_is_the_exponentially_modified_gaussian(angle_deg, sigma_px, trail_px):
    # A straight edge across the travel, blurred by the lens (Gaussian PSF, sigma) and trailed
    # by the detector's time constant (exponential of length L behind the motion): the edge
    # spread function is the CDF of a normal plus an exponential variable, the exponentially
    # modified Gaussian (scipy.stats.exponnorm, K = L / sigma); without the trail, the normal
    # CDF (scipy.stats.norm). Rastered 8x finer than the camera's pixels so the raster's own
    # sampling stays under the 0.015 tolerance; a trail pointing the wrong way is off by
    # 0.2-0.6.
    from scipy import ndimage
    from scipy.stats import exponnorm, norm

    from pvscan.simulate.optics import smear

    f = 8
    sigma, trail = sigma_px * f, trail_px * f
    d = np.array([math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))])
    n = 401
    rows, cols = np.mgrid[0:n, 0:n]
    p = (cols + 0.5) * d[0] - (rows + 0.5) * d[1]  # position along the travel [fine px]
    c = float(np.median(p)) + 0.37
    lens = ndimage.gaussian_filter((p >= c).astype(float), sigma, mode="nearest")
    out = smear(lens, trail, d)
    inner = (np.minimum(rows, cols) > 120) & (np.maximum(rows, cols) < n - 120)
    assert np.abs(lens - norm.cdf((p - c) / sigma))[inner].max() < 0.015
    assert np.abs(out - exponnorm.cdf(p - c, trail / sigma, scale=sigma))[inner].max() < 0.015
    wrong = smear(lens, trail, -d)
    assert np.abs(wrong - exponnorm.cdf(p - c, trail / sigma, scale=sigma))[inner].max() > 0.1


def test_rendered_motion_blur_trails_behind_each_frames_travel():
    # With a detector time constant, each ortho pixel is the unblurred band radiance trailed
    # behind the travel of the frame kept there (speed x time constant): frames of a
    # serpentine flight alternate direction, and each pixel matches its own frame's trail
    # (1e-9 relative) and not the other (the trail is 0.9 px: 3 m/s x 12 ms on 4 cm pixels).
    from pvscan.simulate.optics import smear

    kw = dict(camera={"gsd_m": 0.04, "time_constant_ms": 0.0}, flight={"speed_m_s": 3.0, "frame_px": [320, 256]},
              distractors={"seams": 0})
    plain = _scene(**kw)
    kw["camera"] = {"gsd_m": 0.04, "time_constant_ms": 12.0}
    moving = _scene(**kw)
    assert moving.motion_trail_px == pytest.approx(3.0 * 0.012 / 0.04)
    band = tuple(plain.sc["camera"]["band_um"])
    pad = 12
    r0, c0, nr, nc = pad, pad, plain.height - 2 * pad, plain.width - 2 * pad  # the whole ortho
    base = radiance.band_radiance(plain.render_block(r0 - pad, c0 - pad, nr + 2 * pad, nc + 2 * pad) + 273.15, band)
    got = radiance.band_radiance(moving.render_block(r0, c0, nr, nc) + 273.15, band)
    h0 = moving.plan.headings[0]
    fwd_img = smear(base, moving.motion_trail_px, h0)[pad:-pad, pad:-pad]
    back_img = smear(base, moving.motion_trail_px, -h0)[pad:-pad, pad:-pad]
    x, y = moving.pixel_centres(r0, c0, nr, nc)
    fwd = (moving.plan.headings[moving.frames.index(x, y)] @ h0) > 0
    ok = np.isfinite(got) & np.isfinite(fwd_img) & np.isfinite(back_img)
    assert fwd[ok].any() and (~fwd[ok]).any()  # both directions in the block
    expect = np.where(fwd, fwd_img, back_img)
    np.testing.assert_allclose(got[ok], expect[ok], rtol=1e-9)
    assert np.abs(np.where(fwd, back_img, fwd_img) - got)[ok].max() > 1e-3 * np.abs(got[ok]).max()


def test_vignetting_follows_the_cosine_fourth_law():
    # cos^4 law: the sensor radiance falls by residual * (1 - cos^4 theta), cos theta = H / |C - P|
    # from the 3-D distance to the camera of the frame kept (nearest frame centre); the rendered
    # ortho with and without vignetting (no blur, no noise) gives that ratio to 1e-6.
    from scipy.spatial import cKDTree

    a = 0.05
    plain, vig = _scene(), _scene(camera={"vignetting": a})
    img0 = plain.render_block(0, 0, 120, 160)
    img1 = vig.render_block(0, 0, 120, 160)
    band = tuple(plain.sc["camera"]["band_um"])
    eps, t_r = float(plain.sc["export"]["emissivity"]), float(plain.sc["export"]["reflected_c"])

    def sensor(img):
        return eps * radiance.band_radiance(img + 273.15, band) + (1 - eps) * radiance.band_radiance(t_r + 273.15, band)

    x, y = plain.pixel_centres(0, 0, 120, 160)
    _, k = cKDTree(plain.plan.centres).query(np.stack([x.ravel(), y.ravel()], axis=1))
    c = plain.plan.centres[k]
    H = float(plain.sc["flight"]["altitude_m"])
    cos_t = H / np.sqrt((x.ravel() - c[:, 0]) ** 2 + (y.ravel() - c[:, 1]) ** 2 + H ** 2)
    expect = (1 - a * (1 - cos_t ** 4)).reshape(x.shape)
    ratio = sensor(img1) / sensor(img0)
    ok = np.isfinite(ratio)
    assert ok.mean() > 0.9
    np.testing.assert_allclose(ratio[ok], expect[ok], rtol=1e-6)
    assert expect.min() < 1 - a * 0.1  # the block reaches well off-axis


def test_misaligned_seam_shows_the_scene_shifted():
    # A seam rectangle shifted by exactly two pixels east shows, inside it, what the unshifted
    # ortho shows two pixels further east: edges at its border are doubled or cut.
    plain = _scene()
    gsd = plain.gsd
    shifted = _scene(distractors={"seams": 1, "seam_step_k": [0.0, 0.0], "seam_shift_m": [2 * gsd, 2 * gsd]})
    r0, r1, c0, c1, _ = shifted.seams[0]
    shifted.seam_shift = [(2 * gsd, 0.0)]  # the draw's direction set to east for the check
    rows, cols = max(r0, 0), max(c0, 0)
    nr, nc = min(r1, shifted.height) - rows - 2, min(c1, shifted.width) - cols - 4
    assert nr > 10 and nc > 10
    a = shifted.render_block(rows, cols, nr, nc)
    b = plain.render_block(rows, cols + 2, nr, nc)
    fin = np.isfinite(a) & np.isfinite(b)
    assert fin.mean() > 0.9
    np.testing.assert_allclose(a[fin], b[fin], atol=1e-6)
    assert not np.allclose(a[fin], plain.render_block(rows, cols, nr, nc)[fin], atol=1e-3)


def test_shaded_cells_keep_the_diffuse_share_of_their_rise():
    # Faiman (pvlib.temperature.faiman): the rise over the air is proportional to the absorbed
    # irradiance, so a cell in another row's shadow keeps diffuse_fraction of it; a substring with
    # a cell more than half shaded is bypassed and its cells warm by the open-module rise share.
    scene = _scene(site={"lat": 52.0, "lon": 10.0}, flight={"start": "2026-12-15T12:00:00+01:00"},
                   array={"row_pitch_m": 4.2, "mount_height_m": 0.8}, conditions={"diffuse_fraction": 0.2},
                   defects={"hot_cell": 0, "junction_box": 1})
    shade = scene.row_shade
    assert shade is not None and shade.any.sum() > 0
    front = scene.field.modules["trow"] == 0
    assert not shade.any[front].any()  # the front row stands in the sun
    i = int(next(k for k in np.flatnonzero(shade.any) if int(k) not in scene.defect_of))
    ci, cj = np.unravel_index(np.argmax(shade.fraction[i]), shade.fraction[i].shape)
    g = scene.geom
    u, v = (ci + 0.5) / g.n_along, (cj + 0.5) / g.n_across
    t = float(scene.module_temperature(np.array([i]), np.array([u]), np.array([v]))[0])
    ta, th = float(scene.temp_air[i]), float(scene.temp_healthy[i] + scene.cell_offset[i, ci, cj])
    f = 1.0 - 0.8 * float(shade.fraction[i, ci, cj])
    extra = float(scene.dt_open[i]) * f if shade.bypassed_at(np.array([i]), np.array([cj]))[0] else 0.0
    # 1e-5 K: cell offsets and shaded fractions are stored as float32
    assert t == pytest.approx(ta + (th - ta) * f + extra, abs=1e-5)
    if shade.fraction[i, ci, cj] == 1.0:
        assert t - ta == pytest.approx(0.2 * (th - ta) + 0.2 * float(scene.dt_open[i]), abs=1e-5)
