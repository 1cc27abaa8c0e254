"""Scoring a detected layout against a simulated flight's truth (pvscan.evaluate.evaluate_layout).

Reference: plain Euclidean geometry. A footprint shifted by (dx, dy) has every corner
hypot(dx, dy) from where it was, so the corner error of a shifted copy is known exactly.
"""
from __future__ import annotations

import json

import geopandas as gpd
import numpy as np
import pytest
import shapely
from click.testing import CliRunner
from conftest import test_seed

from pvscan.cli.main import cli
from pvscan.evaluate import evaluate_layout

SEED = test_seed()


def _grid(n_rows, n_cols, x0=500000.0, y0=5700000.0):
    polys, ids = [], []
    for r in range(n_rows):
        for c in range(n_cols):
            x, y = x0 + c * 1.058, y0 + r * 2.0
            polys.append(shapely.box(x, y, x + 1.038, y + 1.9))
            ids.append(f"TB01-01-R{r + 1}-C{c + 1:02d}")
    return gpd.GeoDataFrame({"module_id": ids}, geometry=polys, crs="EPSG:32633")


def test_layout_score_counts_found_extra_and_corner_error(tmp_path):
    rng = np.random.default_rng(SEED)
    truth = _grid(4, 12)
    offset = rng.uniform(-0.6, 0.6, 2)
    drawn = truth.copy()
    drawn["geometry"] = drawn.geometry.translate(*offset)  # truth.geojson holds the layout as drawn
    truth_dir = tmp_path / "flight"
    truth_dir.mkdir()
    drawn.to_crs("EPSG:4326").to_file(truth_dir / "truth.geojson", driver="GeoJSON")
    (truth_dir / "truth.json").write_text(json.dumps({"layout_offset_m": [float(offset[0]), float(offset[1])]}))
    # the detected layout: every module shifted by a few centimetres, some missed, some extra
    shift = rng.uniform(-0.03, 0.03, 2)
    det = truth.copy()
    det["geometry"] = det.geometry.translate(*shift)
    missed = rng.choice(len(det), 3, replace=False)
    det = det.drop(index=missed).reset_index(drop=True)
    extra = _grid(1, 2, x0=500100.0)
    det = gpd.GeoDataFrame(np.concatenate([det.to_numpy(), extra.to_numpy()]), columns=det.columns,
                           geometry="geometry", crs=det.crs)
    path = tmp_path / "layout.gpkg"
    det.to_file(path, layer="modules", driver="GPKG")
    s = evaluate_layout(truth_dir, path)
    assert s["truth_modules"] == 48 and s["layout_modules"] == 47
    assert s["found"] == 45 and s["extra"] == 2
    assert s["found_fraction"] == pytest.approx(45 / 48)
    # corner error of a rigid shift = its length; tolerance 2 mm for the truth's round trip
    # through lon/lat (GeoJSON written by GeoPandas keeps enough decimals for millimetres)
    err = float(np.hypot(*shift))
    assert s["corner_error_m"]["median"] == pytest.approx(err, abs=2e-3)
    assert s["corner_error_m"]["max"] == pytest.approx(err, abs=2e-3)
    assert s["within_5cm"] == 1.0
    r = CliRunner().invoke(cli, ["layout", "score", str(truth_dir), str(path)])
    assert r.exit_code == 0, r.output
    assert "found 45" in r.output and "extra 2" in r.output


def test_layout_score_names_a_missing_file(tmp_path):
    r = CliRunner().invoke(cli, ["layout", "score", str(tmp_path), str(tmp_path / "none.gpkg")])
    assert r.exit_code == 1
    assert "truth.geojson" in r.stderr and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
