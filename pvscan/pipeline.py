"""The post-flight pipeline: one function that runs every stage in order.

:func:`inspect_flight` reads a flight (orthomosaic tiles, layout, conditions, datasheet),
co-registers the layout, measures every module, corrects to true glass temperature,
normalises, classifies, estimates losses, ranks the work and writes the results into a
staging folder that replaces ``out_dir`` only when everything succeeded.

Stages (each a pure function of arrays and (Geo)DataFrames; see DEVELOPERS.md)::

    layout -> register -> zonal (apparent) -> conditions -> radiometry (true)
           -> thermal + classify -> loss -> rank -> outputs -> report
"""
from __future__ import annotations

import contextlib
import logging
import time
from dataclasses import dataclass, field, replace as dc_replace
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from pvscan.io.manifest import Flight, load_flight
from pvscan.io.settings import Pipeline, load_pipeline

__all__ = ["inspect_flight", "InspectionResult", "measure_flight", "true_statistics"]

log = logging.getLogger(__name__)

ProgressFn = Callable[[str, int, int], None]


@dataclass
class InspectionResult:
    """What :func:`inspect_flight` produced.

    Attributes
    ----------
    out_dir : Path or None
        Result folder (None when nothing was written).
    modules : geopandas.GeoDataFrame
        Modules (layout positions, ortho CRS) with their results.
    anomalies : pandas.DataFrame
        Ranked anomalies.
    summary : dict
        The ``summary.json`` document.
    timings_s : dict
        Wall time per stage [s].
    """

    out_dir: Path | None
    modules: Any
    anomalies: pd.DataFrame
    summary: dict
    files: dict = field(default_factory=dict)
    timings_s: dict = field(default_factory=dict)


# ----------------------------------------------------------------------------- radiometry
_ORDER_ARRAYS = ("cell_median", "cell_p95", "sub_median", "sub_p95")
#: Modules converted at a time (bounds the temporaries of the cell arrays).
_CHUNK_MODULES = 8192


def true_statistics(stats, params: dict):
    """Convert apparent-temperature statistics to true glass temperature.

    The conversion (``radiometry.true_from_apparent``) is monotonic, so order statistics
    (median, percentiles, max, min; of modules, cells and substrings) convert exactly; the
    mean and standard deviation through a second-order expansion
    (``radiometry.correct_statistics``).

    Parameters
    ----------
    stats : ZonalStats
        Statistics of apparent temperature [degC].
    params : dict
        Keywords of ``radiometry.true_from_apparent``: scalars or per-module arrays (n,).

    Returns
    -------
    ZonalStats
        The same structure in true glass temperature [degC].
    """
    from pvscan.physics.radiometry import correct_statistics

    table = correct_statistics(stats.table, **params)
    # the (n, cells) arrays in chunks of modules: the conversion is element-wise, so the
    # result is the same, and its float64 temporaries stay bounded whatever the plant size
    n = len(stats.table)
    arrays = {k: np.empty(np.shape(getattr(stats, k)), dtype=np.float64) for k in _ORDER_ARRAYS}
    for i0 in range(0, max(n, 1), _CHUNK_MODULES):
        sl = slice(i0, min(i0 + _CHUNK_MODULES, n))
        part = {k: (v[sl] if np.ndim(v) == 1 and k != "band_um" else v) for k, v in params.items()}
        conv = correct_statistics({k: getattr(stats, k)[sl] for k in _ORDER_ARRAYS}, order_keys=_ORDER_ARRAYS,
                                  **part)
        for k in _ORDER_ARRAYS:
            arrays[k][sl] = conv[k]
    return dc_replace(stats, table=table, **arrays)


def _artefact_summary(seams, modules, enabled: bool) -> dict:
    """summary.json's account of the row stretches levelled as image artefacts (pvscan.measure.seams)."""
    if not enabled or seams is None:
        return {"levelling": False}
    ids = modules["module_id"].astype(str).to_numpy() if "module_id" in modules else np.arange(len(modules)).astype(str)
    return {"levelling": True,
            "stretches": [{"modules": [str(ids[i]) for i in s.modules], "offset_k": round(float(s.offset_k), 3),
                           "reason": s.reason} for s in seams["stretches"]],
            "levelled_modules": int(np.count_nonzero(seams["offsets_k"]))}


# ----------------------------------------------------------------------------- stages
def _clock() -> tuple[float, float]:
    """(wall, CPU) clock readings [s]; CPU is the process's, all threads."""
    return time.perf_counter(), time.process_time()


def _record(timings: dict, stage: str, t0: tuple[float, float]) -> None:
    """Store a stage's wall time [s] in ``timings`` and log its wall and CPU time."""
    wall, cpu = time.perf_counter() - t0[0], time.process_time() - t0[1]
    timings[stage] = wall
    rss, peak = _rss()
    log.info("stage %s: %.3f s wall, %.3f s CPU, peak RSS so far %s, RSS now %s", stage, wall, cpu, peak, rss)


def _rss() -> tuple[str, str]:
    """The process's resident set now and its peak so far (Linux ``VmRSS``, ``VmHWM``)."""
    found = {"VmRSS:": "n/a", "VmHWM:": "n/a"}
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                key = line.split(maxsplit=1)[0] if line.strip() else ""
                if key in found:
                    found[key] = f"{int(line.split()[1]) / 1024:.0f} MiB"
    except (OSError, ValueError, IndexError):
        pass
    return found["VmRSS:"], found["VmHWM:"]


def measure_flight(flight: Flight, settings: Pipeline, progress: ProgressFn | None = None,
                   timings: dict | None = None, scheduler: Any = None, *,
                   shift: tuple[float, float] | None = None, accept_poor_registration: bool = False):
    """Read, register and measure a flight: modules, registration, true statistics, conditions.

    ``scheduler`` (see :mod:`pvscan.tasks`): where the block statistics run; None for this
    process, "threads" / "processes" for local cores, a connected ``distributed.Client``
    (or a ``tcp://`` address) for a Dask cluster. The results do not depend on it.

    ``shift``: a known layout offset (east, north) [m] used instead of the registration's
    own (it is still judged and recorded). When the registration fails (the layout cannot be
    placed on the modules) a :class:`~pvscan.errors.RegistrationError` stops the run unless
    ``accept_poor_registration``; then the run goes on with the layout as drawn and the
    ``registration`` validity check failed.

    Returns
    -------
    dict
        ``modules`` (layout positions), ``registration``, ``stats`` (true temperature,
        levelled for image artefacts along the rows when ``[seams] enabled``),
        ``stats_apparent`` (as measured), ``conditions`` (per module), ``flight_conditions``,
        ``validity``, ``orthos_info``, ``seams`` (``stretches``: list of
        :class:`pvscan.measure.seams.Stretch`; ``offsets_k``: (n,) offsets subtracted [K]).
    """
    from pvscan.errors import RegistrationError
    from pvscan.measure import conditions as cond_mod
    from pvscan.measure import register, validity as val_mod, zonal
    from pvscan.measure.plausibility import check_ortho_values
    from pvscan.io.layout import read_layout
    from pvscan.io.ortho import open_orthos

    timings = {} if timings is None else timings
    t0 = _clock()
    with open_orthos(flight.flight.orthos, flight.ortho, settings) as orthos:
        modules = read_layout(flight, orthos.crs)
        _record(timings, "layout", t0)

        # the expected apparent glass temperature (Faiman + radiometry): the ortho's values are
        # checked against it before anything is measured (units, scale, coverage)
        expected = register.expected_module_apparent_c(flight, settings, strict=False)
        ortho_values = check_ortho_values(orthos, modules, units=flight.ortho.units, scale=flight.ortho.scale,
                                          expected_c=expected, settings=settings, manifest=str(flight.path))

        t0 = _clock()
        lon, lat = _site_lonlat(modules)
        mid = flight.flight.start + (flight.flight.end - flight.flight.start) / 2
        sun = register.sun_vector(lon, lat, mid)
        reg = register.register_layout(orthos, modules, settings["register"], sun=sun, progress=progress,
                                       expected_apparent_c=expected, forced_shift=shift)
        if reg.status == "failed" and not accept_poor_registration:
            raise RegistrationError(
                f"{flight.flight.layout}: {reg.message}; fit the layout with `pvscan align {flight.path} --out "
                f"corrected.gpkg` and use the corrected layout, correct the layout, or give a known offset with "
                f"--shift DX DY (--accept-poor-registration runs anyway, flagged invalid)")
        applied_shift = tuple(reg.shift_m) if reg.applied else (0.0, 0.0)
        measured = register.apply_placement(modules, reg.placement) if reg.applied else modules
        _record(timings, "register", t0)

        t0 = _clock()
        stats_app = zonal.zonal_stats(orthos, measured, flight.module, settings["zonal"], progress=progress,
                                      scheduler=scheduler)
        _record(timings, "zonal", t0)
        orthos_info = {
            "files": [str(t.path) for t in orthos.tiles],
            "crs": orthos.crs.to_string(),
            "gsd_m": float(orthos.gsd_m),
            "tiles": len(orthos.tiles),
        }
        gsd = float(orthos.gsd_m)

    t0 = _clock()
    series = cond_mod.read_weather_series(flight.conditions.series) if flight.conditions.series else None
    frames = cond_mod.read_frames(flight.flight.frames, modules.crs) if flight.flight.frames else None
    fc = cond_mod.flight_conditions(flight.conditions, flight.flight.start, flight.flight.end, series,
                                    settings=settings["conditions"])
    conds = cond_mod.module_conditions(measured, flight.conditions, flight.flight.start, flight.flight.end,
                                       series=series, frames=frames, settings=settings["conditions"],
                                       tilt_deg=flight.layout.tilt_deg)
    validity = cond_mod.check_validity(fc, conds, gsd_m=gsd, module_spec=flight.module,
                                       settings=settings["conditions"])
    _record(timings, "conditions", t0)

    t0 = _clock()
    from pvscan.physics.heat import Faiman
    from pvscan.physics.radiometry import flight_radiometry

    params = flight_radiometry(flight, conds, settings["radiometry"])
    stats = true_statistics(stats_app, params)
    predicted = Faiman.from_settings(settings).temperature(conds["poa_global"].to_numpy(float),
                                                           conds["temp_air"].to_numpy(float),
                                                           conds["wind_speed"].to_numpy(float))
    validity = val_mod.with_checks(validity, [
        val_mod.registration_check(reg, settings),
        val_mod.coverage_check(stats.table["valid_fraction"].to_numpy(float), settings),
        val_mod.plausibility_check(stats.table["t_median_c"].to_numpy(float), predicted, settings),
    ], settings)
    _record(timings, "radiometry", t0)

    t0 = _clock()
    stretches: list = []
    seam_offsets = np.zeros(len(modules))
    if bool(settings["seams"]["enabled"]):
        from pvscan.measure import seams

        stretches = seams.find_stretches(modules, stats.table["t_median_c"].to_numpy(dtype=float), settings["seams"])
        stats, seam_offsets = seams.level_stats(stats, stretches)
    _record(timings, "seams", t0)
    return {
        "modules": modules,
        "registration": reg,
        "shift": applied_shift,
        "ortho_values": ortho_values,
        "stats": stats,
        "stats_apparent": stats_app,
        "conditions": conds,
        "flight_conditions": fc,
        "validity": validity,
        "orthos_info": orthos_info,
        "radiometry": params,
        "seams": {"stretches": stretches, "offsets_k": seam_offsets},
    }


def _check_out_dir(out_dir: Path, overwrite: bool) -> None:
    """Fail before any work when the result folder exists and may not be replaced; remove
    what killed runs left beside it (``outputs.clean_stale_staging``)."""
    from pvscan.errors import OutputError
    from pvscan.io.outputs import clean_stale_staging

    clean_stale_staging(out_dir)

    if out_dir.exists() and not out_dir.is_dir():
        raise OutputError(f"{out_dir}: exists and is not a folder")
    if out_dir.is_dir() and any(out_dir.iterdir()) and not overwrite:
        raise OutputError(f"{out_dir}: output folder exists and is not empty (use --overwrite to replace it)")


def write_results(folder: Path, *, modules, module_table: pd.DataFrame, anomalies: pd.DataFrame,
                  summary: dict, settings=None) -> dict:
    """Write every result file into ``folder`` (a staging folder); return name -> file name."""
    from pvscan.io import outputs

    folder = Path(folder)
    outputs.write_modules_geojson(folder / "modules.geojson", modules, module_table, anomalies, settings=settings)
    outputs.write_anomalies_geojson(folder / "anomalies.geojson", anomalies, modules, settings=settings)
    work = outputs.workorders_table(anomalies, modules, site_crs=modules.crs, settings=settings,
                                    site=summary.get("site"), flight=summary.get("flight"))
    outputs.write_workorders_csv(folder / "workorders.csv", anomalies, modules, table=work)
    outputs.write_workorders_gpx(folder / "workorders.gpx", work)
    outputs.write_geopackage(folder / "pvscan.gpkg", modules.assign(**{c: module_table[c].to_numpy()
                                                                        for c in module_table.columns}),
                             anomalies, work, settings=settings)
    outputs.write_summary(folder / "summary.json", summary)
    return {"modules": "modules.geojson", "anomalies": "anomalies.geojson", "workorders": "workorders.csv",
            "workorders_gpx": "workorders.gpx", "geopackage": "pvscan.gpkg", "summary": "summary.json"}


def _site_lonlat(modules) -> tuple[float, float]:
    """WGS84 (lon, lat) [deg] of the plant's centroid: the area-weighted mean of the footprint
    centroids (the centroid of their union when they do not overlap; no union is built)."""
    import shapely
    from pyproj import Transformer

    geoms = modules.geometry.to_numpy()
    area = shapely.area(geoms)
    c = shapely.get_coordinates(shapely.centroid(geoms))
    x, y = (float(np.sum(c[:, k] * area) / np.sum(area)) for k in (0, 1))
    lon, lat = Transformer.from_crs(modules.crs, 4326, always_xy=True).transform(x, y)
    return float(lon), float(lat)


def inspect_flight(flight: Flight | str | Path, pipeline: Pipeline | str | Path | None = None,
                   out_dir: str | Path | None = None, *, overwrite: bool = False,
                   report: bool = True, progress: ProgressFn | None = None,
                   scheduler: Any = None, shift: tuple[float, float] | None = None,
                   accept_poor_registration: bool = False) -> InspectionResult:
    """Run the whole post-flight pipeline on one flight.

    Parameters
    ----------
    flight : Flight or path-like
        A loaded flight or the path of its ``flight.toml``.
    pipeline : Pipeline or path-like, optional
        Pipeline settings (default ``pipelines/post_flight.toml``).
    out_dir : path-like, optional
        Result folder; written atomically (a staging folder renamed into place). When None,
        nothing is written.
    overwrite : bool
        Replace an existing result folder.
    report : bool
        Also write ``report.html``.
    progress : callable, optional
        ``progress(stage, done, total)``.
    scheduler : None, str or distributed.Client, optional
        Where the block statistics run (:mod:`pvscan.tasks`): None or "single" (this
        process, the default), "synchronous", "threads" / "processes" (local cores), a
        Dask scheduler address ``tcp://host:port`` (connected for this run) or a connected
        ``distributed.Client``. The results are the same on every scheduler.
    shift : (float, float), optional
        A known layout offset (east, north) [m] to use instead of the measured one.
    accept_poor_registration : bool
        Run on when the layout cannot be placed on the modules (``validity.ok`` false,
        every finding at the confidence floor) instead of raising ``RegistrationError``.

    Returns
    -------
    InspectionResult

    Raises
    ------
    PvscanError
        On any bad input; nothing is left in ``out_dir``.
    """
    from pvscan.diagnose import classify, loss, rank
    from pvscan.diagnose.thermal import Normalisation
    from pvscan.io import outputs

    if not isinstance(flight, Flight):
        flight = load_flight(flight)
    settings = pipeline if isinstance(pipeline, Pipeline) else load_pipeline(pipeline)
    if out_dir is not None:
        out_dir = Path(out_dir)
        _check_out_dir(out_dir, overwrite)

    from pvscan.tasks import cluster, is_address, parse_scheduler

    if scheduler is None or isinstance(scheduler, str):
        scheduler = parse_scheduler(scheduler)
    timings: dict[str, float] = {}
    with (cluster(scheduler) if is_address(scheduler) else contextlib.nullcontext(scheduler)) as sched:
        m = measure_flight(flight, settings, progress=progress, timings=timings, scheduler=sched, shift=shift,
                           accept_poor_registration=accept_poor_registration)
    modules = m["modules"]
    stats = m["stats"]
    conds = m["conditions"]
    validity = m["validity"]

    t0 = _clock()
    anomalies, module_table = classify.classify(
        modules, stats, conds, flight.module, settings,
        confidence_factor=float(getattr(validity, "confidence_factor", 1.0)), progress=progress)
    _record(timings, "classify", t0)

    t0 = _clock()
    lon, lat = _site_lonlat(modules)
    anomalies = loss.estimate_loss(anomalies, flight.module, conds, flight.site, settings,
                                   lonlat=(lon, lat), layout=flight.layout, stats=stats,
                                   reference_c=module_table["reference_c"].to_numpy())
    anomalies = rank.rank(anomalies, settings["rank"])
    _record(timings, "loss_rank", t0)

    table = stats.table.copy()
    for col in module_table.columns:
        table[col] = module_table[col].to_numpy()
    shares = loss.module_losses(anomalies, len(modules), pmax_w=flight.module.pmax_w)
    for col in shares.columns:
        table[col] = shares[col].to_numpy()

    no_data = modules.loc[table["valid_fraction"].to_numpy() <= 0, "module_id"].tolist()
    fc = m["flight_conditions"]
    summary = outputs.build_summary(
        modules=modules, anomalies=anomalies, module_spec=flight.module,
        inputs={**m["orthos_info"], "manifest": str(flight.path), "layout": str(flight.flight.layout),
                "modules_without_data": no_data, "ortho_values": m["ortho_values"]},
        conditions=fc.to_dict() if hasattr(fc, "to_dict") else fc,
        validity=validity.to_dict() if hasattr(validity, "to_dict") else validity,
        registration=m["registration"].to_dict(),
        layout_shift_m=m["shift"],
        pipeline_path=settings.path, site=flight.site, flight=flight.flight,
        extra={"radiometry": {k: (v if np.ndim(v) == 0 or k == "band_um" else
                                  {"median": float(np.nanmedian(v)), "min": float(np.nanmin(v)),
                                   "max": float(np.nanmax(v))})
                              for k, v in m["radiometry"].items()},
               "image_artefacts": _artefact_summary(m.get("seams"), modules, bool(settings["seams"]["enabled"])),
               "layout": modules.attrs.get("layout", {}),
               "normalisation": Normalisation.from_settings(settings).to_dict(),
               "timings_s": {k: round(v, 3) for k, v in timings.items()}},
    )
    result = InspectionResult(out_dir=None, modules=modules.assign(**{c: table[c].to_numpy() for c in table}),
                              anomalies=anomalies, summary=summary, timings_s=timings)
    if out_dir is None:
        return result

    t0 = _clock()
    with outputs.staging_dir(out_dir, overwrite=overwrite) as tmp:
        files = write_results(tmp, modules=modules, module_table=table, anomalies=anomalies,
                              summary=summary, settings=settings["outputs"])
        _record(timings, "outputs", t0)
        t0 = _clock()
        if report:
            from pvscan.report import write_report

            write_report(tmp, tmp / "report.html", flight=flight, modules=modules,
                         stats=stats, settings=settings["report"], progress=progress)
            files["report"] = "report.html"
        _record(timings, "report", t0)
    result.out_dir = out_dir
    result.files = {k: out_dir / v for k, v in files.items()}
    return result
