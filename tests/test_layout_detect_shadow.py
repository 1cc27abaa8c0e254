"""Tables whose shadow beside them is at the glass temperature: the lattice stays on the rows.

The reference is the simulator's ``truth_ortho.geojson`` (the module polygons where the ortho
shows them). The plant: fixed tables of 3 x 9 portrait full-cell modules (1.038 x 2.094 m, a
common 410 W size) at 14.6 deg, a low winter sun at 43 deg N, ground heated 24 K by the sun and
at the air temperature in the shade: the shadow behind each table's upper edge reads about the
glass temperature and shows light through the module gaps, so the comb of frame lines runs on
into it. A lattice laid over the table and part of its shadow is not a whole number of rows and
misses the lines between the rows; it used to be refused (confidence 0) and the table lost.
"""
from __future__ import annotations

import numpy as np
import pytest
from conftest import test_seed

SEED = test_seed()

SCENARIO = {
    "site": {"name": "Test plant Longshade (invented)", "lon": -93.4, "lat": 42.8},
    "flight": {"start": "2026-11-14T13:18:00-06:00", "id": "shadow-test", "speed_m_s": 4.0, "altitude_m": 57.3},
    "array": {"kind": "fixed", "orientation": "portrait", "rows": 3, "cols": 9, "tilt_deg": 14.6,
              "rotation_deg": -2.0, "mount_height_m": 0.72, "facing": "equator", "table_rows": 2,
              "tables_per_row": 2, "row_pitch_m": 11.1, "modules_per_string": 9},
    "module": {"model": "Test 410 W (full cells, invented)", "pmax_w": 410.0, "width_m": 1.038, "length_m": 2.094,
               "voc_v": 49.1, "isc_a": 10.6, "half_cut": False, "cells_across": 6, "cells_along": 12,
               "bypass_diodes": 3},
    "conditions": {"poa_irradiance_w_m2": 642.0, "ambient_c": 27.5, "wind_m_s": 5.96},
    "ground": {"sun_rise_k": 24.2, "shade_rise_k": -0.1, "texture_k": 1.1, "field_k": 3.0},
    "camera": {"gsd_m": 0.0362, "psf_sigma_px": 0.68, "netd_k": 0.056, "time_constant_ms": 12.9},
    "distractors": {"cloud_shadows": 0, "reflections": 1, "seams": 1, "hot_objects": 0},
    "defects": {"hot_cell": 1, "several_hot_cells": 0, "bypassed_substring": 1, "several_bypassed_substrings": 0,
                "open_module": 1, "soiling": 0, "junction_box": 0, "open_string": 0, "pid": 0},
    "ortho": {"margin_m": 5.0},
}


@pytest.fixture(scope="module")
def shadow_flight(tmp_path_factory):
    """The plant above, simulated (seeded by PVSCAN_TEST_SEED)."""
    from pvscan.io.manifest import load_flight
    from pvscan.io.settings import load_pipeline
    from pvscan.simulate import simulate_flight

    out = tmp_path_factory.mktemp("shadow") / "flight"
    sim = simulate_flight(SCENARIO, out, seed=SEED)
    return out, load_flight(sim.manifest), load_pipeline()


def _tables(out, crs):
    """Each truth table's modules (corners in the ortho CRS), from truth_ortho.geojson."""
    from pvscan.layout_scores import truth_in_ortho

    truth = truth_in_ortho(out).to_crs(crs)
    tables: dict[str, list[np.ndarray]] = {}
    for mid, geom in zip(truth["module_id"], truth.geometry):
        tables.setdefault("-".join(str(mid).split("-")[:2]), []).append(np.asarray(geom.exterior.coords)[:4])
    return tables


def _corner_error(corners: np.ndarray, truth: np.ndarray) -> float:
    """Corner error of one fitted module [m]: against the truth module nearest its centre, the
    largest distance of a fitted corner from the nearest truth corner (either winding)."""
    k = int(np.argmin(np.hypot(*(truth.mean(axis=1) - corners.mean(axis=0)).T)))
    return float(np.hypot(*(corners[:, None] - truth[k][None]).transpose(2, 0, 1)).min(axis=1).max())


def test_a_table_beside_a_shadow_at_the_glass_level_is_fitted_on_its_rows(shadow_flight):
    """Each table, from a candidate of its own outline (as the mosaic finds it), is fitted
    with its three rows, kept, and its module corners lie on the truth's."""
    from pvscan.io.ortho import open_orthos
    from pvscan.measure.layout_image.lattice import fit_table
    from pvscan.measure.layout_image.segment import TableCandidate, find_tables

    out, fl, settings = shadow_flight
    cfg = dict(settings["layout_detect"])
    rng = np.random.default_rng(SEED)
    with open_orthos(fl, settings=settings) as orthos:
        img, transform = orthos.read_overview(int(cfg["overview_px"]))
        cands = find_tables(img, transform, fl.module.width_m, cfg)
        assert cands
        tables = _tables(out, orthos.crs)
        assert len(tables) == 4 and all(len(m) == 27 for m in tables.values())
        for name, mods in tables.items():
            pts = np.concatenate(mods)
            centre = pts.mean(axis=0)
            near = min(cands, key=lambda c: float(np.hypot(*(c.centre - centre))))
            # the table's long axis: the principal direction of its corners
            axis = np.linalg.svd(pts - centre, full_matrices=False)[2][0]
            s = (pts - centre) @ axis
            w = (pts - centre) @ np.array([-axis[1], axis[0]])
            # the table's outline, a little off (the mosaic's rectangle); the glass level and
            # the ground around it as the mosaic measured them
            cand = TableCandidate(centre=centre + rng.normal(0, 0.05, 2), axis=axis,
                                  length_m=float(np.ptp(s)) * rng.uniform(0.98, 1.02),
                                  depth_m=float(np.ptp(w)) * rng.uniform(0.98, 1.02), level_c=near.level_c,
                                  band_c=near.band_c, energy_log_thr=near.energy_log_thr, ground_c=near.ground_c,
                                  area_px=near.area_px, ground_off_c=near.ground_off_c)
            fit = fit_table(orthos, cand, fl.module, fl.layout, cfg)
            assert fit is not None, name
            # kept by the detection's rules (before: confidence 0 or misfit about 0.3 on
            # tables whose comb ran into the shadow)
            assert fit.confidence >= float(cfg["min_confidence"]), (name, fit.confidence, fit.misfit)
            assert fit.misfit <= float(cfg["max_misfit"]), (name, fit.misfit)
            assert fit.rows == 3, (name, fit.rows)
            # across, the lattice lies on the truth's rows: its long edges within 0.1 m (about
            # three pixels) of the table's
            across = np.array([-axis[1], axis[0]])
            corners = fit.corners().reshape(-1, 4, 2)
            w_fit = (corners.reshape(-1, 2) - centre) @ across
            assert abs(w_fit.min() - w.min()) <= 0.1 and abs(w_fit.max() - w.max()) <= 0.1, \
                (name, w_fit.min(), w.min(), w_fit.max(), w.max())
            # and its modules on the truth's: those within the table have their corners within
            # 0.1 m (the camera's lag shifts a table along the flight line by 2-5 cm, common
            # practice for these sensors' time constants), and they are most of the table. A fit
            # that ran on into the next table of the row (two tables fitted as one: a known limit
            # of the comb, not of the rows) lays one pitch over both and is not checked along
            if fit.cols > SCENARIO["array"]["cols"] + 1:
                continue
            mid = corners.mean(axis=1) - centre
            inside = (np.abs(mid @ axis) <= 0.5 * np.ptp(s)) & (np.abs(mid @ across) <= 0.5 * np.ptp(w))
            truth = np.array(mods)
            err = np.array([_corner_error(g, truth) for g in corners[inside]])
            assert err.size >= 0.8 * len(mods), (name, err.size)
            assert np.median(err) <= 0.1, (name, np.round(err, 3))
