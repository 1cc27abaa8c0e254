"""Two tables of a row stay two tables when the ground between them reads the glass temperature.

The reference is a plant drawn from datasheet numbers and plain geometry (the helpers of
``test_layout_detect_unsure``: modules 1.038 x 2.094 m, 0.02 m gaps, tables of a row a metre
apart, common practice). The ground between two tables of a row, about one module pitch wide,
looks like one more module to the comb of frame lines when it is at the glass temperature
(sunlit ground of the same temperature as the glass, seen on random flights); a lattice laid
over a candidate holding the whole row used to run over all of it and put a module on each gap.
"""
from __future__ import annotations

import math

import numpy as np
from conftest import test_seed
from test_layout_detect_unsure import LENGTH, _draw_plant, _found, _plant, _specs

SEED = test_seed()


def test_a_candidate_over_a_row_of_tables_is_fitted_to_one_table(tmp_path):
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline
    from pvscan.measure.layout_image.lattice import fit_table
    from pvscan.measure.layout_image.segment import TableCandidate

    rng = np.random.default_rng(SEED + 23)
    tilt = rng.uniform(15, 30)
    mod_w = LENGTH * math.cos(math.radians(tilt))
    cols, rows = int(rng.integers(8, 13)), int(rng.integers(2, 4))
    tables = _plant(rng, cols, rows, mod_w, n_rows=1, n_tables=3)
    glass = rng.uniform(25, 45)
    ground = glass + rng.uniform(-1.0, 1.0)  # within the glass level band (level_tol_k 3 K)
    angle = rng.uniform(-20, 20)
    path = tmp_path / "row.tif"
    truth = _draw_plant(path, rng, tables, mod_w, glass, ground, rng.uniform(2.0, 4.0), 0.05, angle)
    module, layout = _specs(tilt)
    cfg = dict(load_pipeline()["layout_detect"])
    a = math.radians(angle)
    axis = np.array([math.cos(a), math.sin(a)])
    every = np.concatenate(truth).reshape(-1, 2)
    middle = truth[1].reshape(-1, 2).mean(axis=0)
    length = float(np.ptp(every @ axis))
    depth = float(np.ptp(every @ np.array([-axis[1], axis[0]])))
    with open_orthos(path) as orthos:
        # the mosaic's candidate over the whole row, centred near the middle table
        cand = TableCandidate(centre=middle + rng.normal(0, 0.1, 2), axis=axis, length_m=length, depth_m=depth,
                              level_c=glass, band_c=(glass - 1.0, glass + 1.0), energy_log_thr=0.0, ground_c=ground,
                              area_px=1)
        fit = fit_table(orthos, cand, module, layout, cfg)
    assert fit is not None
    # one table: its rows and columns, and every module of the middle table within a pixel
    # and a half of where it was drawn (before: 3 cols + 2 along the whole row, one on each gap)
    assert (fit.rows, fit.cols) == (rows, cols), (fit.rows, fit.cols)
    import geopandas as gpd
    from shapely import polygons

    got = gpd.GeoDataFrame(geometry=list(polygons(fit.corners().reshape(-1, 4, 2))))
    assert _found(got, truth[1], 0.075) == rows * cols
