"""The vectorised module evidence and the lockstep pattern search (pvscan.measure.register
evidence / search / ends) against plain computations.

- the spread inside a placed footprint equals numpy's standard deviation (``np.std``, ddof 0)
  of the pixels whose centres, mapped back to the layout by the inverse similarity
  (``numpy.linalg.inv``), fall inside the inset footprint: the footprint's box is cropped out
  of each window before masking, which must leave out no pixel of the footprint or its band;
- the outline contrast equals |mean of the band pixels - mean inside| by the same brute force;
- the translations searched for many groups at once equal each group's own Hooke and Jeeves
  search (Hooke and Jeeves 1961: the path depends on the evidence of each trial only);
- the average ranks of the table-end test equal ``scipy.stats.rankdata`` (ties averaged).

Windows, frames and pixels are random for the suite's seed (PVSCAN_TEST_SEED); any seed passes.
"""
from __future__ import annotations

import math

import numpy as np
import scipy.stats
from conftest import test_seed

from pvscan.measure.register.ends import _average_ranks
from pvscan.measure.register.evidence import ModuleSample, Placement, evidence, module_spread
from pvscan.measure.register.search import group_evidence, refine_placement, refine_translations

SEED = test_seed()
#: Pixels whose module coordinate lies this close to an edge of the mask are avoided [-]: the
#: library computes coordinates in float32 (relative error ~6e-8, ~3e-7 here), the reference in float64.
EDGE_EPS = 1e-5


def _sample(rng: np.random.Generator, k: int = 24, side: int = 48, gsd: float = 0.07) -> ModuleSample:
    """k windows of side x side pixels of gsd [m] around modules of random orientation."""
    ang = rng.uniform(0.0, math.pi, k)
    lu, lv = rng.uniform(1.6, 2.3, k), rng.uniform(0.9, 1.15, k)
    ux, uy = lu * np.cos(ang), lu * np.sin(ang)
    vx, vy = -lv * np.sin(ang), lv * np.cos(ang)
    cx, cy = rng.uniform(-40, 40, k), rng.uniform(-40, 40, k)
    fr = np.column_stack([cx - 0.5 * (ux + vx), cy - 0.5 * (uy + vy), ux, uy, vx, vy])
    # window centred on the module: pixel (0, 0) centre at the top left (north up)
    x0 = cx - (side / 2 - 0.5) * gsd + rng.uniform(-0.03, 0.03, k)
    y0 = cy + (side / 2 - 0.5) * gsd + rng.uniform(-0.03, 0.03, k)
    vals = rng.normal(30.0, 2.0, (k, side, side)).astype(np.float32)
    vals[rng.random((k, side, side)) < 0.02] = np.nan  # some invalid pixels
    return ModuleSample(index=np.arange(k), values=vals, x0=x0, y0=y0, gx=gsd, gy=-gsd, frames=fr,
                        table=np.array([f"T{i // 4}" for i in range(k)], object))


def _uv(s: ModuleSample, p: Placement, m: int, local: np.ndarray | None):
    """Module coordinates (u, v) of every pixel centre of window m, in float64."""
    n = s.values.shape[1]
    jj, ii = np.meshgrid(np.arange(n), np.arange(n))
    px = s.x0[m] + jj * s.gx - (local[m, 0] if local is not None else 0.0)
    py = s.y0[m] + ii * s.gy - (local[m, 1] if local is not None else 0.0)
    # layout point: q = c + M^-1 (P - c - t)
    minv = np.linalg.inv(p.matrix)
    dx, dy = px - p.cx - p.tx, py - p.cy - p.ty
    qx = p.cx + minv[0, 0] * dx + minv[0, 1] * dy
    qy = p.cy + minv[1, 0] * dx + minv[1, 1] * dy
    o, a, b = s.frames[m, :2], s.frames[m, 2:4], s.frames[m, 4:6]
    u = ((qx - o[0]) * a[0] + (qy - o[1]) * a[1]) / (a @ a)
    v = ((qx - o[0]) * b[0] + (qy - o[1]) * b[1]) / (b @ b)
    return u, v


def _clear_of_edges(u, v, edges_u, edges_v) -> bool:
    return all(np.min(np.abs(u - e)) > EDGE_EPS for e in edges_u) and all(
        np.min(np.abs(v - e)) > EDGE_EPS for e in edges_v)


def test_spread_and_contrast_of_cropped_windows_equal_the_brute_force():
    rng = np.random.default_rng([SEED, 1])
    s = _sample(rng)
    inset, band = 0.08, 0.06
    checked = 0
    for trial in range(40):
        p = Placement(rng.normal(0, 0.4), rng.normal(0, 0.4), rng.normal(0, 1.0), 1.0 + rng.normal(0, 0.01),
                      rng.normal(0, 5), rng.normal(0, 5))
        local = rng.normal(0, 0.1, (len(s), 2)) if trial % 2 else None
        sd = module_spread(s, p, inset_u=inset, inset_v=inset, local=local)
        ratio = module_spread(s, p, inset_u=inset, inset_v=inset, local=local, band_m=band)
        for m in range(len(s)):
            u, v = _uv(s, p, m, local)
            bu = band / (math.hypot(*s.frames[m, 2:4]) * p.scale)
            bv = band / (math.hypot(*s.frames[m, 4:6]) * p.scale)
            if not _clear_of_edges(u, v, (inset, 1 - inset, -bu, bu, 1 - bu, 1 + bu),
                                   (inset, 1 - inset, -bv, bv, 1 - bv, 1 + bv)):
                continue
            x = s.values[m]  # centred on the window's median: the spread does not depend on it
            fin = np.isfinite(x)
            inside = (u >= inset) & (u <= 1 - inset) & (v >= inset) & (v <= 1 - inset) & fin
            in_u, in_v = (u >= -bu) & (u <= 1 + bu), (v >= -bv) & (v <= 1 + bv)
            ring = ((((np.abs(u) <= bu) | (np.abs(u - 1) <= bu)) & in_v)
                    | (((np.abs(v) <= bv) | (np.abs(v - 1) <= bv)) & in_u)) & fin
            if inside.sum() < 8 or ring.sum() < 8:
                assert np.isnan(sd[m]) or inside.sum() >= 8
                continue
            ref = float(np.std(x[inside].astype(np.float64)))
            assert math.isclose(sd[m], ref, rel_tol=1e-9, abs_tol=1e-9), (trial, m, sd[m], ref)
            contrast = abs(float(np.mean(x[ring].astype(np.float64))) - float(np.mean(x[inside].astype(np.float64))))
            ref_ratio = min(ref / max(contrast, 0.05), 1.0)
            assert math.isclose(ratio[m], ref_ratio, rel_tol=1e-9, abs_tol=1e-9), (trial, m, ratio[m], ref_ratio)
            checked += 1
    assert checked > 200  # most footprints are clear of the float32 edge band


def _cfg(**over):
    cfg = {"evidence_inset": 0.03, "evidence_band_m": None, "evidence_step_m": 0.04, "evidence_step_deg": 0.1,
           "evidence_step_scale": 0.002, "max_shift_m": 0.2, "max_rotation_deg": 3.0, "max_scale_error": 0.02}
    cfg.update(over)
    return cfg


def _take(s: ModuleSample, sel: np.ndarray) -> ModuleSample:
    return ModuleSample(index=s.index[sel], values=s.values[sel], x0=s.x0[sel], y0=s.y0[sel], gx=s.gx, gy=s.gy,
                        frames=s.frames[sel], table=s.table[sel], centred=s.centred[sel], ref=s.ref[sel])


def test_lockstep_search_takes_each_groups_own_path():
    rng = np.random.default_rng([SEED, 2])
    s = _sample(rng, k=28)
    # a smooth bowl under each group's modules so that the searches walk some steps: the
    # pixels of a module rise with their distance from a point near the module centre
    n = s.values.shape[1]
    jj, ii = np.meshgrid(np.arange(n), np.arange(n))
    for m in range(len(s)):
        c = n / 2 + rng.normal(0, 2, 2)
        s.values[m] = (0.02 * np.hypot(jj - c[0], ii - c[1]) ** 2 + rng.normal(0, 0.3, (n, n))).astype(np.float32)
    s = ModuleSample(index=s.index, values=s.values, x0=s.x0, y0=s.y0, gx=s.gx, gy=s.gy, frames=s.frames,
                     table=s.table)
    groups = [np.arange(i, min(i + 4, len(s))) for i in range(0, len(s), 4)]
    start = Placement(cx=1.0, cy=-2.0)
    cfg = _cfg()
    e0 = group_evidence(s, start, groups, cfg)
    found = refine_translations(s, groups, start, cfg, start_evidence=e0)
    moved = 0
    for g, sel in enumerate(groups):
        sub = _take(s, sel)
        own0 = evidence(module_spread(sub, start, inset_u=0.03, inset_v=0.03))
        assert math.isclose(e0[g], own0, rel_tol=1e-12)
        p, e = refine_placement(sub, start, cfg, rotate=False, scale=False, start_evidence=own0)
        q, f = found[g]
        assert abs(p.tx - q.tx) < 1e-12 and abs(p.ty - q.ty) < 1e-12, (g, p, q)
        assert math.isclose(e, f, rel_tol=1e-9)
        assert f <= e0[g]  # a search never ends worse than it started
        moved += math.hypot(q.tx, q.ty) > 0
    assert moved >= 1


def test_average_ranks_equal_scipy_rankdata():
    rng = np.random.default_rng([SEED, 3])
    for t in range(60):
        k, p = int(rng.integers(1, 12)), int(rng.integers(1, 40))
        a = rng.normal(size=(k, p))
        if t % 2:
            a = np.round(a * 2.0)  # many ties
        np.testing.assert_array_equal(_average_ranks(a), scipy.stats.rankdata(a, axis=1))
