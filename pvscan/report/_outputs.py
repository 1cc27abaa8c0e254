"""The pipeline's last stages: the result files and the report, written into a staging folder.

The report reads the files it describes (``modules.geojson``, ``anomalies.geojson``,
``workorders.csv``, ``summary.json``), so those are written first. Two pieces of work do
not wait on anything the report makes and spend most of their time outside Python's
interpreter lock (GDAL decoding the ortho, GDAL / SQLite writing the GeoPackage, zlib): the
report's decimated ortho overview is read in a second thread while the files are written,
and the GeoPackage and GPX are written in that thread while the report is drawn. Every file
is made by the same functions from the same inputs as one after the other (:func:`write_results`),
so the files are the same; only the second core is used.
"""
from __future__ import annotations

import logging
import time
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from pvscan._typing import ProgressFn

if TYPE_CHECKING:
    import geopandas as gpd

log = logging.getLogger(__name__)

__all__ = ["write_results", "write_outputs", "RESULT_FILES"]

#: Result name -> file name in the result folder.
RESULT_FILES = {"modules": "modules.geojson", "anomalies": "anomalies.geojson", "workorders": "workorders.csv",
                "workorders_gpx": "workorders.gpx", "geopackage": "pvscan.gpkg", "summary": "summary.json"}


def _report_inputs(folder: Path, *, modules: gpd.GeoDataFrame, module_table: pd.DataFrame,
                   anomalies: pd.DataFrame, summary: Mapping[str, Any],
                   settings: Mapping[str, Any] | None) -> tuple[pd.DataFrame, Any]:
    """Write the files the report reads; return the prepared anomalies and the work orders."""
    from pvscan.io import outputs

    # priority order, ids, walk order and the first module's attributes: once for every writer
    anomalies = outputs.prepare_anomalies(anomalies, modules, settings)
    outputs.write_modules_geojson(folder / RESULT_FILES["modules"], modules, module_table, anomalies,
                                  settings=settings)
    outputs.write_anomalies_geojson(folder / RESULT_FILES["anomalies"], anomalies, modules, settings=settings)
    work = outputs.workorders_table(anomalies, modules, site_crs=modules.crs, settings=settings,
                                    site=summary.get("site"), flight=summary.get("flight"))
    outputs.write_workorders_csv(folder / RESULT_FILES["workorders"], anomalies, modules, table=work)
    outputs.write_summary(folder / RESULT_FILES["summary"], summary)
    return anomalies, work


def _other_files(folder: Path, *, modules: gpd.GeoDataFrame, module_table: pd.DataFrame,
                 anomalies: pd.DataFrame, work: Any, settings: Mapping[str, Any] | None) -> None:
    """Write the files nothing else in the run reads: GPX and GeoPackage."""
    from pvscan.io import outputs

    outputs.write_workorders_gpx(folder / RESULT_FILES["workorders_gpx"], work)
    outputs.write_geopackage(folder / RESULT_FILES["geopackage"],
                             modules.assign(**{c: module_table[c].to_numpy() for c in module_table.columns}),
                             anomalies, work, settings=settings)


def write_results(folder: Path, *, modules: gpd.GeoDataFrame, module_table: pd.DataFrame,
                  anomalies: pd.DataFrame, summary: Mapping[str, Any],
                  settings: Mapping[str, Any] | None = None) -> dict[str, str]:
    """Write every result file into ``folder`` (a staging folder), one after the other;
    return name -> file name."""
    folder = Path(folder)
    anomalies, work = _report_inputs(folder, modules=modules, module_table=module_table, anomalies=anomalies,
                                     summary=summary, settings=settings)
    _other_files(folder, modules=modules, module_table=module_table, anomalies=anomalies, work=work,
                 settings=settings)
    return dict(RESULT_FILES)


def write_outputs(folder: Path, *, modules: gpd.GeoDataFrame, module_table: pd.DataFrame,
                  anomalies: pd.DataFrame, summary: Mapping[str, Any], settings: Any,
                  flight: Any = None, report: bool = True, progress: ProgressFn | None = None,
                  stage_done: Callable[[str], None] | None = None, overview: Any = None) -> dict[str, str]:
    """Write every result file and, with ``report``, ``report.html`` into ``folder`` (a
    staging folder), using a second thread where the work allows (module docstring); return
    name -> file name.

    Parameters
    ----------
    folder : Path
        The staging folder.
    modules, module_table, anomalies, summary
        As for :func:`write_results`.
    settings : Pipeline or mapping
        The pipeline settings (its ``[outputs]`` and ``[report]`` sections are used).
    flight : pvscan.io.manifest.Flight, optional
        The flight (the report's orthos and their units).
    report : bool
        Also write ``report.html``.
    progress : callable, optional
        ``progress(stage, done, total)``, called from this thread only.
    stage_done : callable, optional
        ``stage_done(name)`` when a stage ends: ``"outputs"`` once the files the report reads
        are written, ``"report"`` once the report and the files written beside it are.
    overview : pvscan.report._raster.OverviewDone, optional
        The report's ortho overview made beforehand; without it (or when it was made for
        other tiles or another size) the overview is read in the second thread.

    Raises
    ------
    PvscanError
        From any writer or the report; the other thread has ended by then.
    """
    folder = Path(folder)
    out_cfg = settings["outputs"]
    done = stage_done if stage_done is not None else (lambda name: None)
    if not report:
        files = write_results(folder, modules=modules, module_table=module_table, anomalies=anomalies,
                              summary=summary, settings=out_cfg)
        done("outputs")
        done("report")
        return files
    from pvscan.report._build import read_overview_ahead, write_report

    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="pvscan-outputs") as pool:
        # leaving the block waits for the thread's work, also on an error: nothing is still
        # writing when the caller removes the staging folder
        ahead = overview if overview is not None else read_overview_ahead(flight, settings["report"], pool)
        prepared, work = _report_inputs(folder, modules=modules, module_table=module_table,
                                        anomalies=anomalies, summary=summary, settings=out_cfg)
        done("outputs")
        others = pool.submit(_other_files, folder, modules=modules, module_table=module_table,
                             anomalies=prepared, work=work, settings=out_cfg)
        try:
            write_report(folder, folder / "report.html", flight=flight, modules=modules,
                         settings=settings["report"], progress=progress, overview=ahead)
        except BaseException:
            # one after the other, the GeoPackage and GPX came first: their error is the one to report
            if others.exception() is not None:
                others.result()
            raise
        t0 = time.perf_counter()
        others.result()  # a writer's error is raised here
        log.debug("report: %.3f s waiting for the GeoPackage and GPX", time.perf_counter() - t0)
    done("report")
    return {**RESULT_FILES, "report": "report.html"}
