"""Tables at two glass levels in one mosaic: a cloud shadow's edge or a mosaic seam across the plant.

A cloud shadow takes a quarter or more of the irradiance off part of a plant; the glass there
sits some kelvin cooler, since the module's rise above the air is about proportional to the
irradiance (Faiman's model, IEC 61853-2: ``T = T_air + G / (U0 + U1 v)``, some 20-25 K at
800 W/m2 with U0 = 25, U1 = 6.84, from memory), and a mosaic seam between frames flown minutes
apart steps the level by a kelvin or more (common practice). The tables form one textured
region on the search mosaic, so one glass level for the region left the part of the plant
beyond the edge, and the part of a table beyond it, without a candidate. Each table here must
be covered by the candidates whatever side of the edge it lies on.

The mosaic is drawn here (no simulator): module frames 35 mm wide and cooler than the glass
(common practice: aluminium frames conduct heat away and read cool on sunlit modules), rendered
at four times the pixel size and averaged (the pixel's footprint), blurred by the optics (a
Gaussian of 0.5-0.9 px, common practice), ground textured.
"""
from __future__ import annotations

import numpy as np
from affine import Affine
from conftest import test_seed
from scipy import ndimage as ndi

SEED = test_seed()

WIDTH, DEPTH, GAP, FRAME = 1.038, 1.95, 0.02, 0.035  # module footprint, gap, frame [m]


def _plant(rng: np.random.Generator, gsd: float):
    """A mosaic [degC] of 2 table rows x 3 tables (2 x 10 portrait modules), the same mosaic with
    glass and ground 4-6 K off the rest east of an edge across the middle table of the first row,
    their transform, the tables' outlines (x0, y0, x1, y1) [m] and the easting of the edge [m]."""
    cols, rows = 10, 2
    length = cols * WIDTH + (cols - 1) * GAP
    depth = rows * DEPTH + (rows - 1) * GAP
    between, pitch_rows = rng.uniform(0.9, 1.2), depth + rng.uniform(2.5, 4.0)
    tables = [(3.0 + k * (length + between), 3.0 + r * pitch_rows) for r in range(2) for k in range(3)]
    size_x = 6.0 + 3 * length + 2 * between
    size_y = 6.0 + 2 * pitch_rows
    sub = 4
    nx, ny = int(size_x / gsd), int(size_y / gsd)
    xs = (np.arange(nx * sub) + 0.5) * gsd / sub
    ys = (np.arange(ny * sub) + 0.5) * gsd / sub
    glass_c = rng.uniform(35.0, 45.0)
    # ground warmer or cooler than the glass by more than the glass band ([layout_detect] level_tol_k 3 K)
    ground_c = glass_c + rng.choice([-1.0, 1.0]) * rng.uniform(6.0, 14.0)
    hi = np.full((ny * sub, nx * sub), ground_c)
    for x0, y0 in tables:
        ix = (xs >= x0) & (xs < x0 + length)
        iy = (ys >= y0) & (ys < y0 + depth)
        sx, sy = xs[ix] - x0, ys[iy] - y0
        px, py = WIDTH + GAP, DEPTH + GAP
        on_x = np.mod(sx, px) < WIDTH
        on_y = np.mod(sy, py) < DEPTH
        fx = (np.mod(sx, px) < FRAME) | ((np.mod(sx, px) > WIDTH - FRAME) & on_x)
        fy = (np.mod(sy, py) < FRAME) | ((np.mod(sy, py) > DEPTH - FRAME) & on_y)
        level = glass_c + rng.normal(0.0, 0.3, (rows, cols))  # module-to-module spread
        mod = level[np.clip((sy // py).astype(int), 0, rows - 1)][:, np.clip((sx // px).astype(int), 0, cols - 1)]
        block = np.where(fy[:, None] | fx[None, :], mod - 2.0, mod)
        block = np.where(on_y[:, None] & on_x[None, :], block, ground_c)
        hi[np.ix_(iy, ix)] = block
    img = hi.reshape(ny, sub, nx, sub).mean(axis=(1, 3))
    img = ndi.gaussian_filter(img, rng.uniform(0.5, 0.9))  # the optics' blur [px]
    # ground texture (0.5 K over about a metre) and the camera's noise (NETD 0.05 K, common practice)
    img += 0.5 * ndi.gaussian_filter(rng.normal(0.0, 1.0, img.shape), 1.0 / gsd) * (1.0 / gsd)
    img += rng.normal(0.0, 0.05, img.shape)
    # the edge: across the middle table of the first row, the glass and ground beyond it cooler
    # (a cloud shadow) or warmer (the sunlit side of a seam)
    x_mid = tables[1][0] + rng.uniform(0.3, 0.7) * length
    step = rng.choice([-1.0, 1.0]) * rng.uniform(4.0, 6.0)
    xc = (np.arange(nx) + 0.5) * gsd
    stepped = img.copy()
    stepped[:, xc > x_mid] += step
    # north-up: row 0 at the top (y = size_y)
    transform = Affine(gsd, 0.0, 0.0, 0.0, -gsd, ny * gsd)
    outlines = [(x0, y0, x0 + length, y0 + depth) for x0, y0 in tables]
    return img[::-1].astype(np.float32), stepped[::-1].astype(np.float32), transform, outlines, x_mid


def test_every_table_has_a_candidate_on_either_side_of_a_level_step():
    from shapely import box, polygons, union_all

    from pvscan.io.settings import section_defaults
    from pvscan.measure.layout_image.segment import find_tables

    cfg = dict(section_defaults("layout_detect"))
    rng = np.random.default_rng(SEED)
    n_seen = 0
    for _ in range(3):
        gsd = float(rng.uniform(0.02, 0.035))
        plain, stepped, transform, outlines, x_mid = _plant(rng, gsd)
        x0, y0, x1, y1 = outlines[1]
        # every table, and the middle table either side of the edge
        parts = [box(*o) for o in outlines] + [box(x0, y0, x_mid, y1), box(x_mid, y0, x1, y1)]
        shares = []
        for img in (plain, stepped):
            rects = []
            for c in find_tables(img, transform, WIDTH, cfg):
                n = np.array([-c.axis[1], c.axis[0]])
                h_s, h_w = 0.5 * c.length_m * c.axis, 0.5 * c.depth_m * n
                rects.append(polygons(np.array([c.centre - h_s - h_w, c.centre + h_s - h_w, c.centre + h_s + h_w,
                                                c.centre - h_s + h_w])))
            cover = union_all(rects)
            shares.append([cover.intersection(p).area / p.area for p in parts])
        plain_share, step_share = np.array(shares)
        # what the mosaic's candidates hold of a table without the edge (a good part; the lattice
        # fit then measures the table on the full pixels and joins the parts of a row) they hold
        # with it, on either side; before, the glass beyond the edge had no candidate (share 0)
        seen = plain_share >= 0.25
        n_seen += int(seen.sum())
        assert (step_share[seen] >= 0.25).all(), (plain_share.round(2), step_share.round(2), gsd)
    # (the drawn mosaic's texture is not a simulated flight's: a plant the search misses
    # without the edge can happen; most of the tables are seen)
    assert n_seen >= 8, n_seen
