"""The registration drawn in the report (pvscan.report._registration).

Two tables of modules laid out with shapely boxes; a registration record as summary.json
writes it. Arrow positions are checked against shapely's own centroids (the mean of the
module centroids of a table, plain geometry), the figure against the PNG signature
(ISO/IEC 15948: the eight bytes 89 50 4E 47 0D 0A 1A 0A).
"""
from __future__ import annotations

import base64

import pandas as pd
import pytest
import shapely

from pvscan.report._registration import registration_detail, table_arrows

PNG_SIGNATURE = bytes([0x89, 0x50, 0x4E, 0x47, 0x0D, 0x0A, 0x1A, 0x0A])


def _site():
    geoms, tables = [], []
    for t, y0 in (("T1", 0.0), ("T2", 6.0)):
        for k in range(10):
            geoms.append(shapely.box(1000.0 + 1.05 * k, y0, 1001.0 + 1.05 * k, y0 + 2.0))
            tables.append(t)
    return pd.DataFrame({"table_id": tables, "module_id": [f"M{i}" for i in range(len(geoms))]}), geoms


def _summary(status="ok"):
    return {"registration": {
        "status": status, "applied": True, "layout_shift_m": [0.42, -0.31],
        "placement": {"shift_m": [0.42, -0.31], "rotation_deg": 0.5, "scale": 1.004, "centre": [1005.0, 4.0]},
        "evidence": {"drawn": {"evidence": 2.1, "ratio_u": 0.95, "ratio_v": 0.9, "glass_error_k": -1.0, "ok": False},
                     "proposals": [{"evidence": 0.1, "ratio_u": 0.2, "ratio_v": 0.15, "glass_error_k": 0.3, "ok": True,
                                    "shift_m": [0.42, -0.31], "rotation_deg": 0.5}],
                     "chosen": {"evidence": 0.1, "ratio_u": 0.2, "ratio_v": 0.15, "glass_error_k": 0.3, "ok": True},
                     "pitch": {"lowest_ratio": 1.6, "limit": 1.1, "decisive": True, "moved_m": [0.0, 0.0]}},
        "local": {"applied": True, "tables_measured": 2, "tables_refined": 1, "tables_from_neighbours": 0,
                  "tables_rejected": 0, "residual_rms_m": 0.05, "residual_max_m": 0.05,
                  "evidence_before": 0.4, "evidence_after": 0.3},
        "tables": [{"table_id": "T2", "dx_m": 0.03, "dy_m": -0.04}],
        "message": "layout moved"}}


def test_table_arrows_sit_at_the_table_centres():
    mods, geoms = _site()
    arrows = table_arrows(_summary()["registration"], mods, geoms)
    assert len(arrows) == 1
    x, y, dx, dy, kind = arrows[0]
    t2 = [g for g, t in zip(geoms, mods["table_id"]) if t == "T2"]
    cx = sum(g.centroid.x for g in t2) / len(t2)
    cy = sum(g.centroid.y for g in t2) / len(t2)
    assert (x, y) == pytest.approx((cx, cy)) and (dx, dy) == (0.03, -0.04) and kind == "table"
    # a table the layout does not hold draws nothing
    rec = {"tables": [{"table_id": "T9", "dx_m": 0.1, "dy_m": 0.0}]}
    assert table_arrows(rec, mods, geoms) == []


def test_registration_detail_states_the_fit_and_draws_it():
    mods, geoms = _site()
    d = registration_detail(_summary(), mods, geoms, dpi=60)
    rows = dict(d["placement"])
    assert rows["shift at the site centre"].startswith("+0.420 m east, -0.310 m north")
    # |(0.42, -0.31)| = 0.522 m (Pythagoras)
    assert "(0.522 m)" in rows["shift at the site centre"]
    assert rows["scale"] == "+0.400 %"
    assert [r["name"].split(" (")[0] for r in d["evidence"]] == ["layout as drawn", "proposal 1", "placement used"]
    assert d["evidence"][0]["ok"] == "no" and d["evidence"][2]["ok"] == "yes"
    assert dict(d["pitch"])["decisive"] == "yes"
    assert dict(d["local"])["tables refined"] == "1" and d["n_tables"] == 1
    png = base64.b64decode(d["figure"].split(",", 1)[1])
    assert png[:8] == PNG_SIGNATURE


def test_ambiguous_and_missing_registrations():
    mods, geoms = _site()
    d = registration_detail(_summary("ambiguous"), mods, geoms, dpi=60)
    assert d["status"] == "ambiguous" and "neighbouring module" in d["status_text"]
    assert registration_detail({}, mods, geoms, dpi=60) is None
    # no geometry to draw on: the rows stay, no figure
    assert registration_detail(_summary(), mods, [], dpi=60)["figure"] == ""


def test_row_arrows_sit_at_the_row_centres():
    # T1 as two table rows (modules 0-4 row 0, 5-9 row 1); a row correction draws one arrow at
    # the mean of that row's module centroids, a table row given as 1, 1.0 or "1" the same
    mods, geoms = _site()
    mods["table_row"] = [0] * 5 + [1] * 5 + [0] * 10
    rows = [mods.index[(mods["table_id"] == "T1") & (mods["table_row"] == 1)]]
    g1 = [geoms[i] for i in rows[0]]
    cx = sum(g.centroid.x for g in g1) / len(g1)
    cy = sum(g.centroid.y for g in g1) / len(g1)
    for given in (1, 1.0, "1"):
        rec = {"rows": [{"table_id": "T1", "table_row": given, "dx_m": -0.02, "dy_m": 0.05}]}
        arrows = table_arrows(rec, mods, geoms)
        assert len(arrows) == 1
        x, y, dx, dy, kind = arrows[0]
        assert (x, y) == pytest.approx((cx, cy)) and (dx, dy) == (-0.02, 0.05) and kind == "row"
    summary = _summary()
    summary["registration"]["local_rows"] = {"applied": True, "rows_measured": 4, "rows_refined": 1,
                                             "rows_rejected": 0, "residual_rms_m": 0.054, "residual_max_m": 0.054}
    summary["registration"]["rows"] = [{"table_id": "T1", "table_row": 1, "dx_m": -0.02, "dy_m": 0.05}]
    d = registration_detail(summary, mods, geoms, dpi=60)
    assert dict(d["local"])["table rows refined"] == "1"
    assert d["n_tables"] == 1 and d["n_rows"] == 1
