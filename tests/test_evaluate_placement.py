"""Tests of the scorer's placement error and of its reading of missed defects
(pvscan.evaluate: ``registration.placed_error_m`` and ``missed``).

The placement error is checked against plane geometry worked by hand: a rigid rotation by an
angle d about a centre moves a point at distance r from it by the chord 2 r sin(d / 2), and a
similarity composed with its exact inverse moves nothing (textbook geometry). The spread of the
healthy modules is the scaled median absolute deviation, 1.4826 x MAD (Hampel 1974), worked by
hand for a set of +-0.3 K values (MAD 0.3 K).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from pyproj import Transformer

from pvscan.evaluate import evaluate, format_report

EPSG = 32632
CENTRE = np.array([500_100.0, 5_000_050.0])
TO_LONLAT = Transformer.from_crs(EPSG, 4326, always_xy=True)


def _modules(seed: int) -> list[tuple[str, str, int, np.ndarray]]:
    """Two tables of 2 rows x 10 modules (1 m x 2 m), the second at a random spot [m]."""
    rng = np.random.default_rng(seed)
    out = []
    origins = {"TB01": CENTRE + [-15.0, -4.0], "TB02": CENTRE + [rng.uniform(2, 6), rng.uniform(-3, 3)]}
    for tid, o in origins.items():
        for row in (1, 2):
            for col in range(1, 11):
                x0, y0 = o + [(col - 1) * 1.02, (row - 1) * 2.02]
                ring = np.array([[x0, y0], [x0 + 1, y0], [x0 + 1, y0 + 2], [x0, y0 + 2], [x0, y0]])
                out.append((f"{tid}-R{row}-C{col:02d}", tid, row, ring))
    return out


def _rot(deg: float) -> np.ndarray:
    a = math.radians(deg)
    return np.array([[math.cos(a), -math.sin(a)], [math.sin(a), math.cos(a)]])


def _draw(ring: np.ndarray, theta: float, scale: float, shift: np.ndarray, extra: np.ndarray) -> np.ndarray:
    """The drawn layout: ``c + scale R(theta) (p - c) + shift + extra`` (a table's own error)."""
    return CENTRE + scale * (ring - CENTRE) @ _rot(theta).T + shift + extra


def _write(tmp_path, seed: int, registration: dict, *, delta: dict | None = None, rename: bool = False,
           found: frozenset = frozenset()):
    """Truth in the ortho (EPSG 32632), the drawn layout as a result (lon/lat) and a summary."""
    tdir, rdir = tmp_path / "flight", tmp_path / "result"
    tdir.mkdir()
    rdir.mkdir()
    mods = _modules(seed)
    ortho, truth, result = [], [], []
    for mid, tid, row, ring in mods:
        props = {"module_id": mid, "table_id": tid}
        ortho.append({"type": "Feature", "properties": props,
                      "geometry": {"type": "Polygon", "coordinates": [ring.tolist()]}})
        drawn = _draw(ring, 1.5, 0.995, np.array([0.6, -0.3]), np.array([0.1, 0.05]) if tid == "TB02" else np.zeros(2))
        lon, lat = TO_LONLAT.transform(drawn[:, 0], drawn[:, 1])
        geom = {"type": "Polygon", "coordinates": [np.column_stack([lon, lat]).tolist()]}
        d_true, d_meas, defect = (delta or {}).get(mid, (0.0, 0.0, None))
        truth.append({"type": "Feature", "geometry": geom, "properties": {
            "module_id": mid, "defect": defect, "power_loss_w": 0.0, "delta_t_k": d_true, "t_true_median_c": 40.0}})
        result.append({"type": "Feature", "geometry": geom, "properties": {
            "module_id": f"X{len(result)}" if rename else mid, "table_id": tid, "table_row": row,
            "defect": defect if mid in found else None, "power_loss_w": 0.0,
            "t_median_c": 40.0, "delta_t_k": d_meas}})
    fc = {"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": f"urn:ogc:def:crs:EPSG::{EPSG}"}},
          "features": ortho}
    (tdir / "truth_ortho.geojson").write_text(json.dumps(fc))
    (tdir / "truth.geojson").write_text(json.dumps({"type": "FeatureCollection", "features": truth,
                                                    "pvscan_truth": {"layout_offset_m": [0.6, -0.3]}}))
    (rdir / "modules.geojson").write_text(json.dumps({"type": "FeatureCollection", "features": result}))
    (rdir / "summary.json").write_text(json.dumps({"layout_shift_m": registration.get("layout_shift_m"),
                                                   "registration": registration}))
    return tdir, rdir, mods


def _inverse(extra_rotation_deg: float = 0.0) -> dict:
    """The registration record that undoes the drawing exactly (then turns by ``extra``)."""
    s, th, d, e = 0.995, 1.5, np.array([0.6, -0.3]), np.array([0.1, 0.05])
    inv = _rot(-th) / s
    t = -inv @ d
    rd = _rot(extra_rotation_deg)
    return {"placement": {"centre": CENTRE.tolist(), "rotation_deg": -th + extra_rotation_deg, "scale": 1 / s,
                          "shift_m": (rd @ t).tolist()},
            "tables": [{"table_id": "TB02", "dx_m": float(-(inv @ e)[0]), "dy_m": float(-(inv @ e)[1])}]
            if extra_rotation_deg == 0.0 else [],
            "rows": [], "layout_shift_m": (rd @ t).tolist()}


@pytest.mark.parametrize("rename", [False, True])
def test_exact_inverse_places_every_module(tmp_path, seed, rename):
    # with other ids in the result (matched by position), modules are still paired through the
    # truth's ids, not the result's
    tdir, rdir, _ = _write(tmp_path, seed, _inverse(), rename=rename)
    pe = evaluate(tdir, rdir)["registration"]["placed_error_m"]
    assert pe["n"] == 40
    assert pe["max_m"] < 1e-3


def test_a_turned_placement_shows_as_the_chord(tmp_path, seed):
    # the exact inverse turned by 0.25 deg more about the centre: each module moves by the chord
    # 2 r sin(d / 2), r its true centre's distance from the centre (TB02 gets no table offset here,
    # so its modules also carry the table's own drawing error, turned back: |e| / s)
    d = 0.25
    tdir, rdir, mods = _write(tmp_path, seed, _inverse(d))
    scores = evaluate(tdir, rdir)
    pe = scores["registration"]["placed_error_m"]
    e_back = np.linalg.norm([0.1, 0.05]) / 0.995
    expected = []
    for _mid, tid, _row, ring in mods:
        c = ring[:4].mean(axis=0) - CENTRE
        moved = _rot(d) @ (c + (_rot(-1.5) @ np.array([0.1, 0.05]) / 0.995 if tid == "TB02" else 0.0))
        expected.append(np.linalg.norm(moved - c))
    assert pe["median_m"] == pytest.approx(float(np.median(expected)), abs=1e-3)
    assert pe["max_m"] == pytest.approx(float(np.max(expected)), abs=1e-3)
    # the TB01 modules alone follow the chord formula
    tb01 = [2 * np.linalg.norm(ring[:4].mean(axis=0) - CENTRE) * math.sin(math.radians(d) / 2)
            for _m, tid, _r, ring in mods if tid == "TB01"]
    assert min(expected) <= min(tb01) + 1e-9 and max(tb01) <= pe["max_m"] + 1e-3
    assert e_back > 0.1  # the TB02 error is larger than a cell's width fraction: it must show
    assert "footprints placed" in format_report(scores)


def test_missed_defects_are_read_against_the_healthy_spread(tmp_path, seed):
    rng = np.random.default_rng(seed)
    mods = _modules(seed)
    ids = [m[0] for m in mods]
    faint, clear = ids[3], ids[24]  # one of each sign: 19 healthy at +0.3 K, 19 at -0.3 K
    # healthy modules measured at +-0.3 K (MAD 0.3 K, spread 1.4826 x 0.3 = 0.445 K); one missed
    # defect rising 0.8 K (contrast 1.8: faint), one rising 4 K (contrast 9: clear)
    delta = {mid: (0.0, 0.3 if k % 2 else -0.3, None) for k, mid in enumerate(ids)}
    delta[faint] = (0.8, float(rng.uniform(0.0, 0.3)), "pid")
    delta[clear] = (4.0, float(rng.uniform(0.0, 0.3)), "junction_box")
    tdir, rdir, _ = _write(tmp_path, seed, _inverse(), delta=delta)
    scores = evaluate(tdir, rdir)
    m = scores["missed"]
    assert m["healthy_spread_k"] == pytest.approx(1.4826 * 0.3, abs=1e-6)
    assert m["n_missed"] == 2 and m["n_faint"] == 1
    by_id = {x["module_id"]: x for x in m["modules"]}
    assert by_id[faint]["contrast"] == pytest.approx(0.8 / (1.4826 * 0.3), rel=1e-4)
    assert by_id[clear]["contrast"] == pytest.approx(4.0 / (1.4826 * 0.3), rel=1e-4)
    assert "1 faint" in format_report(scores) and "1 clear" in format_report(scores)
    # recall over the defects a flight lets be seen: the faint one does not count, the clear one does
    assert (m["n_clear_true"], m["n_clear_found"], m["recall_clear"]) == (1, 0, 0.0)


def test_recall_clear_leaves_out_faint_defects_only(tmp_path, seed):
    """Four defects: one faint (contrast < 3, missed), three clear (two found, one missed).
    Recall 2/4; recall over the clear ones 2/3 (a signal under about three times the noise is
    not reliably seen: common practice, from memory)."""
    rng = np.random.default_rng(seed)
    ids = [m[0] for m in _modules(seed)]
    # two odd and two even ids: 18 healthy at +0.3 K and 18 at -0.3 K (spread 1.4826 x 0.3 K)
    faint, clear_found, clear_missed, found2 = ids[5], ids[11], ids[30], ids[20]
    delta = {mid: (0.0, 0.3 if k % 2 else -0.3, None) for k, mid in enumerate(ids)}
    delta[faint] = (float(rng.uniform(0.2, 1.2)), 0.1, "pid")            # contrast < 2.7
    delta[clear_found] = (float(rng.uniform(3.0, 6.0)), 3.0, "open_module")
    delta[clear_missed] = (float(rng.uniform(1.5, 6.0)), 0.2, "junction_box")  # contrast > 3.3
    delta[found2] = (float(rng.uniform(3.0, 6.0)), 2.5, "hot_cell")
    tdir, rdir, _ = _write(tmp_path, seed, _inverse(), delta=delta, found=frozenset({clear_found, found2}))
    scores = evaluate(tdir, rdir)
    m = scores["missed"]
    assert scores["module"]["recall"] == pytest.approx(0.5, abs=1e-6)
    assert m["n_faint"] == 1 and m["n_missed"] == 2
    assert (m["n_clear_true"], m["n_clear_found"]) == (3, 2)
    assert m["recall_clear"] == pytest.approx(2 / 3, abs=1e-6)
    assert "recall over the clear defects 0.67 (2 of 3)" in format_report(scores)
