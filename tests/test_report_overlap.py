"""The last stages on two threads (pvscan.report._outputs.write_outputs): the ortho overview
read ahead (or made beforehand from the zonal statistics' block reads), the GeoPackage and
GPX written while the report is drawn.

References: the overview is checked against rasterio's own decimated (nearest-neighbour)
read of the GeoTIFF and the ``value = raw * scale + offset`` conversion of the flight's
manifest; the files against the same files written one after the other
(:func:`pvscan.report._outputs.write_results`, then :func:`pvscan.report.write_report`).
"""
from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from conftest import test_seed

from pvscan.errors import PvscanError

RESULT_TEXT_FILES = ("modules.geojson", "anomalies.geojson", "workorders.csv", "workorders.gpx", "summary.json",
                     "report.html")


@pytest.fixture(scope="module")
def captured(tmp_path_factory):
    """A small simulated flight through ``inspect_flight`` (report on), with the arguments
    the pipeline handed to ``write_outputs`` kept (the function itself runs unchanged)."""
    import pvscan.report._outputs as po
    from pvscan.pipeline import inspect_flight
    from pvscan.simulate import simulate_flight

    d = tmp_path_factory.mktemp("overlap")
    none = {k: 0 for k in ("several_hot_cells", "several_bypassed_substrings", "open_string", "pid", "soiling")}
    sc = {"site": {"name": "Test field Sedge Hollow (invented)", "lon": 9.81, "lat": 46.52},
          "array": {"table_rows": 2, "tables_per_row": 2, "rows": 2, "cols": 8, "rotation_deg": 7.0,
                    "modules_per_string": 8},
          "layout": {"features": "modules"},
          "defects": {"open_module": 1, "bypassed_substring": 1, "hot_cell": 2, **none}}
    sim = simulate_flight(sc, d / "flight", seed=test_seed())
    calls = []
    real = po.write_outputs

    def keep(folder, **kw):
        calls.append(kw)
        return real(folder, **kw)

    mp = pytest.MonkeyPatch()
    mp.setattr(po, "write_outputs", keep)
    try:
        inspect_flight(sim.manifest, out_dir=d / "threaded", report=True, accept_poor_registration=True)
    finally:
        mp.undo()
    assert len(calls) == 1
    return d, calls[0]


def test_overview_read_ahead_is_rasterios_decimated_read(captured):
    """Reference: rasterio's nearest-neighbour read of the whole GeoTIFF at the overview's
    size, converted with the manifest's scale and offset (celsius) [degC]."""
    import rasterio
    from rasterio.enums import Resampling

    from pvscan.io.ortho import open_orthos
    from pvscan.report._raster import OverviewRead, ThermalView

    _, kw = captured
    flight = kw["flight"]
    max_px = int(kw["settings"]["report"]["overview_max_px"])
    paths = list(flight.flight.orthos)
    assert len(paths) == 1 and flight.ortho.units == "celsius"
    with ThreadPoolExecutor(max_workers=1) as pool:
        ahead = OverviewRead(paths, flight.ortho, max_px, pool)
        with open_orthos(paths, flight.ortho) as oset:
            got = ahead.result(oset, max_px)
            assert got is not None
            # another size is not handed over: the caller reads its own
            assert OverviewRead(paths, flight.ortho, max_px // 2, pool).result(oset, max_px) is None
            in_place = ThermalView(oset).overview(max_px)
    image, extent = got
    assert np.array_equal(image, in_place[0], equal_nan=True) and extent == in_place[1]
    with rasterio.open(paths[0]) as ds:
        b = ds.bounds
        # a grid of square cells of the longer side / max_px (never finer than a pixel),
        # from the top left corner; the tile covers round(its size / cell) of them
        step = max(max(b.right - b.left, b.top - b.bottom) / max_px, abs(ds.transform.a))
        h, w = math.ceil((b.top - b.bottom) / step), math.ceil((b.right - b.left) / step)
        rh, rw = min(h, round((b.top - b.bottom) / step)), min(w, round((b.right - b.left) / step))
        raw = ds.read(1, out_shape=(rh, rw), resampling=Resampling.nearest, masked=True)
    want = np.full((h, w), np.nan)
    want[:rh, :rw] = (raw.astype(np.float64) * flight.ortho.scale + flight.ortho.offset).filled(np.nan)
    assert image.shape == want.shape
    assert np.isfinite(image).mean() > 0.5
    assert np.array_equal(np.isnan(image), np.isnan(want))
    assert np.allclose(image[~np.isnan(image)], want[~np.isnan(want)], rtol=0, atol=1e-4)
    assert extent == pytest.approx((b.left, b.left + step * w, b.top - step * h, b.top))


def test_overview_from_the_zonal_blocks_is_the_decimated_read(captured):
    """Reference: the report's own decimated read of the ortho (``ThermalView.overview``, GDAL's
    nearest-neighbour read; checked against rasterio above): the overview the pipeline made
    from the zonal statistics' block reads (``OverviewSampler``) is the same image and extent."""
    from pvscan.io.ortho import open_orthos
    from pvscan.report._raster import OverviewDone, ThermalView

    _, kw = captured
    flight, made = kw["flight"], kw["overview"]
    max_px = int(kw["settings"]["report"]["overview_max_px"])
    assert isinstance(made, OverviewDone)
    with open_orthos(list(flight.flight.orthos), flight.ortho) as oset:
        got = made.result(oset, max_px)
        assert made.result(oset, max_px // 2) is None  # another size: the report reads its own
        in_place = ThermalView(oset).overview(max_px)
    assert got is not None
    assert np.isfinite(got[0]).mean() > 0.5
    assert np.array_equal(got[0], in_place[0], equal_nan=True) and got[1] == in_place[1]


def test_files_are_those_written_one_after_another(captured):
    """Reference: the same inputs written sequentially (write_results, then write_report
    reading its own overview): every text file byte for byte, the GeoPackage's layers and
    styles value for value (its styles carry the time they were written)."""
    import sqlite3

    import pyogrio

    from pvscan.report import write_report
    from pvscan.report._outputs import write_outputs, write_results

    d, kw = captured
    threaded, one_by_one = d / "again", d / "sequential"
    threaded.mkdir()
    one_by_one.mkdir()
    stages = []
    files = write_outputs(threaded, **{**kw, "stage_done": stages.append})
    assert stages == ["outputs", "report"]
    write_results(one_by_one, modules=kw["modules"], module_table=kw["module_table"], anomalies=kw["anomalies"],
                  summary=kw["summary"], settings=kw["settings"]["outputs"])
    write_report(one_by_one, one_by_one / "report.html", flight=kw["flight"], modules=kw["modules"],
                 settings=kw["settings"]["report"])
    assert sorted(files.values()) == sorted(p.name for p in one_by_one.iterdir())
    for name in RESULT_TEXT_FILES:
        assert (threaded / name).read_bytes() == (one_by_one / name).read_bytes(), name
    for layer in ("modules", "anomalies", "workorders"):
        a = pyogrio.read_dataframe(threaded / "pvscan.gpkg", layer=layer)
        b = pyogrio.read_dataframe(one_by_one / "pvscan.gpkg", layer=layer)
        assert len(a) == len(b) > 0
        assert a.drop(columns="geometry").equals(b.drop(columns="geometry"))
        assert list(a.geometry.to_wkb()) == list(b.geometry.to_wkb())
    q = "SELECT f_table_name, styleName, styleQML, styleSLD FROM layer_styles ORDER BY f_table_name"
    styles = []
    for folder in (threaded, one_by_one):
        con = sqlite3.connect(folder / "pvscan.gpkg")
        try:
            styles.append(con.execute(q).fetchall())
        finally:
            con.close()
    assert styles[0] == styles[1] and len(styles[0]) == 3


def test_a_writer_error_on_the_second_thread_reaches_the_caller(captured):
    """A GeoPackage that cannot be written (its name taken by a non-empty folder) fails the
    run with the same error as written one after the other; the report thread's files do
    not hide it."""
    from pvscan.report._outputs import write_outputs, write_results

    d, kw = captured
    errors = []
    for name, run in (("threaded", lambda f: write_outputs(f, **kw)),
                      ("sequential", lambda f: write_results(f, modules=kw["modules"], module_table=kw["module_table"],
                                                             anomalies=kw["anomalies"], summary=kw["summary"],
                                                             settings=kw["settings"]["outputs"]))):
        folder = d / f"blocked_{name}"
        (folder / "pvscan.gpkg").mkdir(parents=True)
        (folder / "pvscan.gpkg" / "keep.txt").write_text("taken")
        with pytest.raises((PvscanError, OSError)) as err:
            run(folder)
        errors.append((type(err.value), str(err.value).replace(str(folder), "<dir>")))
    assert errors[0] == errors[1]
    assert Path(d / "blocked_threaded" / "pvscan.gpkg" / "keep.txt").read_text() == "taken"
