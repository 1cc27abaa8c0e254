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
from collections.abc import Mapping
from dataclasses import dataclass, field
from dataclasses import replace as dc_replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from pvscan._typing import ProgressFn
from pvscan.io.manifest import Flight, load_flight
from pvscan.io.settings import Pipeline, load_pipeline

if TYPE_CHECKING:
    import geopandas as gpd

    from pvscan.measure.conditions import FlightConditions
    from pvscan.measure.register import Registration
    from pvscan.measure.seams import Stretch
    from pvscan.measure.validity import Validity
    from pvscan.measure.zonal import ZonalStats

__all__ = ["inspect_flight", "InspectionResult", "Measurement", "OrthoInfo", "SeamLevelling", "measure_flight",
           "run_settings", "true_statistics", "detected_layout", "STRING_PATTERNS"]

log = logging.getLogger(__name__)

#: Pipeline sections read by other commands (``pvscan evaluate``, ``pvscan history``, ``pvscan
#: layout detect``), not by :func:`inspect_flight`; ``summary.json`` ``settings`` holds the others.
OTHER_COMMANDS_SECTIONS = frozenset({"evaluate", "history", "layout_detect"})


def run_settings(settings: Pipeline) -> dict[str, dict[str, Any]]:
    """The settings sections an inspection reads, as plain data (``summary.json`` ``settings``):
    what a reader of the result (the report, a site history) needs to know how it was made."""
    data = settings.to_dict()
    return {name: data[name] for name in sorted(data) if name not in OTHER_COMMANDS_SECTIONS}


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
    files : dict
        Result name -> path of each file written (empty when nothing was written).
    timings_s : dict
        Wall time per stage [s].
    """

    out_dir: Path | None
    modules: gpd.GeoDataFrame
    anomalies: pd.DataFrame
    summary: dict[str, Any]
    files: dict[str, Path] = field(default_factory=dict)
    timings_s: dict[str, float] = field(default_factory=dict)


# ----------------------------------------------------------------------------- stage records
@dataclass(frozen=True)
class OrthoInfo:
    """The orthomosaic tiles measured (``summary.json`` ``inputs``).

    Attributes
    ----------
    files : list of str
        Tile paths.
    crs : str
        The ortho's CRS (the site CRS of every geometry before output).
    gsd_m : float
        Finest ground sampling distance of the tiles [m/px].
    tiles : int
        Number of tiles.
    """

    files: list[str]
    crs: str
    gsd_m: float
    tiles: int

    def to_dict(self) -> dict[str, Any]:
        """The keys of ``summary.json`` ``inputs``."""
        return {"files": list(self.files), "crs": self.crs, "gsd_m": self.gsd_m, "tiles": self.tiles}


@dataclass(frozen=True)
class SeamLevelling:
    """The row stretches levelled as image artefacts (:mod:`pvscan.measure.seams`).

    Attributes
    ----------
    stretches : list of Stretch
        Levelled stretches (empty when none, or when ``[seams] enabled`` is false).
    offsets_k : numpy.ndarray
        (n,) offset subtracted from each module's temperatures [K] (0 where none).
    enabled : bool
        Whether ``[seams] enabled`` was on.
    """

    stretches: list[Stretch]
    offsets_k: np.ndarray
    enabled: bool

    def to_dict(self, module_ids: np.ndarray) -> dict[str, Any]:
        """``summary.json`` ``image_artefacts``; ``module_ids`` name the modules by index."""
        if not self.enabled:
            return {"levelling": False}
        return {"levelling": True,
                "stretches": [{"modules": [str(module_ids[i]) for i in s.modules],
                               "offset_k": round(float(s.offset_k), 3), "reason": s.reason}
                              for s in self.stretches],
                "levelled_modules": int(np.count_nonzero(self.offsets_k))}


@dataclass(frozen=True)
class Measurement:
    """What :func:`measure_flight` hands the diagnosis: every module measured and its conditions.

    Attributes
    ----------
    modules : geopandas.GeoDataFrame
        The modules in the layout's positions (ortho CRS) with their local frames.
    registration : Registration
        How the layout was placed on the ortho.
    shift : (float, float)
        The layout shift applied, east and north [m] (``(0, 0)`` when none).
    ortho_values : dict
        The ortho value check (:func:`pvscan.measure.plausibility.check_ortho_values`).
    stats : ZonalStats
        True glass temperatures [degC], levelled for image artefacts along the rows when
        ``[seams] enabled``.
    stats_apparent : ZonalStats
        Apparent temperatures as measured [degC].
    conditions : pandas.DataFrame
        Per-module conditions (:func:`pvscan.measure.conditions.module_conditions`).
    flight_conditions : FlightConditions
        The flight's mean conditions.
    validity : Validity
        Acquisition limits and measurement checks.
    orthos_info : OrthoInfo
        The tiles measured.
    radiometry : dict
        Keywords of ``radiometry.true_from_apparent`` the run used (scalars or (n,) arrays).
    seams : SeamLevelling
        The stretches levelled and the offsets subtracted.
    overview : pvscan.report._raster.OverviewDone or None
        The report's decimated ortho overview, made from the zonal statistics' block reads
        (``overview_px`` of :func:`measure_flight`); None when not asked for or not made.
    """

    modules: gpd.GeoDataFrame
    registration: Registration
    shift: tuple[float, float]
    ortho_values: dict[str, Any]
    stats: ZonalStats
    stats_apparent: ZonalStats
    conditions: pd.DataFrame
    flight_conditions: FlightConditions
    validity: Validity
    orthos_info: OrthoInfo
    radiometry: dict[str, Any]
    seams: SeamLevelling
    overview: Any = None


# ----------------------------------------------------------------------------- radiometry
_ORDER_ARRAYS = ("cell_median", "cell_p95", "sub_median", "sub_p95")
#: Modules converted at a time (bounds the temporaries of the cell arrays).
_CHUNK_MODULES = 8192


def true_statistics(stats: ZonalStats, params: Mapping[str, Any]) -> ZonalStats:
    """Convert apparent-temperature statistics to true glass temperature.

    The conversion (``radiometry.true_from_apparent``) is monotonic, so order statistics
    (median, percentiles, max, min; of modules, cells and substrings) convert exactly; the
    mean and standard deviation through a second-order expansion
    (``radiometry.correct_statistics``).

    Parameters
    ----------
    stats : ZonalStats
        Statistics of apparent temperature [degC].
    params : mapping
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
    return dc_replace(stats, table=table, cell_median=arrays["cell_median"], cell_p95=arrays["cell_p95"],
                      sub_median=arrays["sub_median"], sub_p95=arrays["sub_p95"])


# ----------------------------------------------------------------------------- stages
def _clock() -> tuple[float, float]:
    """(wall, CPU) clock readings [s]; CPU is the process's, all threads."""
    return time.perf_counter(), time.process_time()


def _record(timings: dict[str, float], stage: str, t0: tuple[float, float]) -> None:
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
                   timings: dict[str, float] | None = None, scheduler: Any = None, *,
                   shift: tuple[float, float] | None = None, accept_poor_registration: bool = False,
                   overview_px: int | None = None) -> Measurement:
    """Read, register and measure a flight: modules, registration, true statistics, conditions.

    ``scheduler`` (see :mod:`pvscan.tasks`): where the block statistics run; None for this
    process, "threads" / "processes" for local cores, a connected ``distributed.Client``
    (or a ``tcp://`` address) for a Dask cluster. The results do not depend on it.

    ``shift``: a known layout offset (east, north) [m] used instead of the registration's
    own (it is still judged and recorded). When the registration fails (the layout cannot be
    placed on the modules: ``failed``; one a module pitch away fits as well: ``ambiguous``) a
    :class:`~pvscan.errors.RegistrationError` stops the run unless ``accept_poor_registration``;
    then it goes on (failed: the layout as drawn) with the ``registration`` check failed.

    ``overview_px``: also make the report's ortho overview of that longest side [px]
    (``[report] overview_max_px``) from the blocks the zonal statistics read
    (:class:`pvscan.io.ortho_overview.OverviewSampler`: the same image as a decimated read of the
    ortho, without decoding those blocks again); in this process only (``scheduler`` None).

    Returns
    -------
    Measurement
    """
    from pvscan.errors import RegistrationError
    from pvscan.io.layout import read_layout
    from pvscan.io.ortho import open_orthos
    from pvscan.io.ortho_overview import OverviewSampler, finish_overview_ahead
    from pvscan.measure import register, zonal
    from pvscan.measure import validity as val_mod
    from pvscan.measure.conditions import conditions_for_flight
    from pvscan.measure.plausibility import check_ortho_values
    from pvscan.report._raster import OverviewDone

    timings = {} if timings is None else timings
    t0 = _clock()
    detected = flight.flight.layout is None
    with open_orthos(flight.flight.orthos, flight.ortho, settings) as orthos:
        modules = detected_layout(flight, orthos, settings, progress) if detected else read_layout(flight, orthos.crs)
        _record(timings, "layout", t0)

        # the expected apparent glass temperature (Faiman + radiometry): the ortho's values are
        # checked against it before anything is measured (units, scale, coverage)
        expected = register.expected_module_apparent_c(flight, settings, strict=False)
        ortho_values = check_ortho_values(orthos, modules, units=flight.ortho.units, scale=flight.ortho.scale,
                                          expected_c=expected, settings=settings, manifest=str(flight.path))

        t0 = _clock()
        from pvscan.measure.register.physics import site_lonlat

        lon, lat = site_lonlat(modules)
        mid = flight.flight.start + (flight.flight.end - flight.flight.start) / 2
        sun = register.sun_vector(lon, lat, mid)
        if detected:
            # the layout was found in this ortho: it is where the modules are, nothing to place
            reg = register.Registration(status="not_run", message="layout detected in the ortho; no registration")
        else:
            reg = register.register_layout(orthos, modules, settings["register"], sun=sun, progress=progress,
                                           expected_apparent_c=expected, forced_shift=shift)
        if reg.status in ("failed", "ambiguous") and not accept_poor_registration:  # ambiguous: one pitch off?
            todo = ("fit the layout with" if reg.status == "failed" else "check the placement drawn by")
            raise RegistrationError(
                f"{flight.flight.layout}: {reg.message}; {todo} `pvscan align {flight.path} --out "
                f"corrected.gpkg` and use the corrected layout, correct the layout, or give a known offset with "
                f"--shift DX DY (--accept-poor-registration runs anyway, flagged invalid)")
        applied_shift = (float(reg.shift_m[0]), float(reg.shift_m[1])) if reg.applied else (0.0, 0.0)
        measured = register.apply_placement(modules, reg.placement) if reg.applied else modules
        _record(timings, "register", t0)

        t0 = _clock()
        sampler = OverviewSampler(orthos, overview_px) if overview_px and scheduler is None else None
        stats_app = zonal.zonal_stats(orthos, measured, flight.module, settings["zonal"], progress=progress,
                                      scheduler=scheduler, overview=sampler)
        ahead = finish_overview_ahead(sampler, orthos)
        overview = None if ahead is None or sampler is None else OverviewDone(orthos.tiles, sampler.max_px, ahead)
        _record(timings, "zonal", t0)
        orthos_info = OrthoInfo(files=[str(t.path) for t in orthos.tiles], crs=orthos.crs.to_string(),
                                gsd_m=float(orthos.gsd_m), tiles=len(orthos.tiles))
        gsd = float(orthos.gsd_m)

    t0 = _clock()
    fc, conds, validity = conditions_for_flight(flight, measured, gsd_m=gsd, settings=settings["conditions"])
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
        val_mod.row_shading_check(measured, flight.layout.tilt_deg, flight.layout.azimuth_deg, lon, lat,
                                  (flight.flight.start, mid, flight.flight.end), settings),
        val_mod.detected_layout_check(measured, settings),
    ], settings)
    _record(timings, "radiometry", t0)

    t0 = _clock()
    stretches: list[Stretch] = []
    seam_offsets = np.zeros(len(modules))
    levelling = bool(settings["seams"]["enabled"])
    if levelling:
        from pvscan.measure import seams

        stretches = seams.find_stretches(modules, stats.table["t_median_c"].to_numpy(dtype=float), settings["seams"])
        stats, seam_offsets = seams.level_stats(stats, stretches)
    _record(timings, "seams", t0)
    return Measurement(modules=modules, registration=reg, shift=applied_shift, ortho_values=ortho_values,
                       stats=stats, stats_apparent=stats_app, conditions=conds, flight_conditions=fc,
                       validity=validity, orthos_info=orthos_info, radiometry=params,
                       seams=SeamLevelling(stretches=stretches, offsets_k=seam_offsets, enabled=levelling),
                       overview=overview)


#: String-level patterns: they follow a string from its negative end, so they need string ids.
STRING_PATTERNS = ("open_string", "pid")


def detected_layout(flight: Flight, orthos: Any, settings: Pipeline,
                    progress: ProgressFn | None = None) -> gpd.GeoDataFrame:
    """The modules of a flight without ``flight.layout``: detected in the ortho
    (:func:`pvscan.measure.layout_image.detect_layout`), as :func:`pvscan.io.layout.read_layout`
    returns a drawn layout (ids as ``pvscan layout detect`` writes them, no string ids).

    ``attrs["layout"]`` records ``source`` "detected", the detection's counts
    (``detected``), the string patterns not run (``skipped_patterns``) and a warning saying so.
    """
    from pvscan.io.layout.build import build_modules
    from pvscan.measure.layout_image import detect_layout

    det = detect_layout(orthos, flight.module, flight.layout, settings, progress)
    name = "layout detected in the ortho"
    out = build_modules(det.modules.drop(columns=["status", "confidence", "orientation"]), flight.layout,
                        flight.module, name)
    info = dict(out.attrs.get("layout", {}))
    s = det.summary()
    info.update(file=name, source="detected", detected=s, skipped_patterns=list(STRING_PATTERNS))
    info["warnings"] = [*info.get("warnings", []), (
        f"{name}: no flight.layout, {s['tables']} tables and {s['modules']} modules found in the ortho "
        f"(table confidence min {s['confidence_min']:.2f}); open_string and pid need string ids and were not "
        f"looked for")]
    out.attrs["layout"] = info
    return out


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


def __getattr__(name: str) -> Any:  # moved to the report package; importable here as before
    if name == "write_results":
        from pvscan.report._outputs import write_results

        return write_results
    raise AttributeError(name)


def _evidence_validity(validity: Validity, diagnosis: Any, settings: Pipeline
                       ) -> tuple[Validity, pd.DataFrame, pd.DataFrame]:
    """``validity`` with the checks of the classification's evidence
    (:func:`pvscan.measure.validity.evidence_checks`); when one fails, every confidence of
    the findings drops by the same factor as the flight's."""
    from pvscan.measure import validity as val_mod

    before = float(validity.confidence_factor)
    validity = val_mod.with_checks(validity, val_mod.evidence_checks(diagnosis.evidence, settings), settings)
    anomalies, module_table = diagnosis.anomalies, diagnosis.modules
    after = float(validity.confidence_factor)
    if before > 0 and after < before:
        anomalies = anomalies.assign(confidence=anomalies["confidence"] * (after / before))
        module_table = module_table.assign(confidence=module_table["confidence"] * (after / before))
    return validity, anomalies, module_table


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
                           accept_poor_registration=accept_poor_registration,
                           overview_px=(int(settings["report"]["overview_max_px"])
                                        if report and out_dir is not None and flight.flight.orthos else None))
    modules = m.modules
    stats = m.stats
    conds = m.conditions
    validity = m.validity

    t0 = _clock()
    diagnosis = classify.classify(
        modules, stats, conds, flight.module, settings,
        confidence_factor=float(validity.confidence_factor), progress=progress,
        string_patterns=flight.flight.layout is not None)
    anomalies, module_table = diagnosis
    # checks of what the classification measured about the flight as a whole
    validity, anomalies, module_table = _evidence_validity(validity, diagnosis, settings)
    _record(timings, "classify", t0)

    t0 = _clock()
    from pvscan.measure.register.physics import site_lonlat

    lon, lat = site_lonlat(modules)
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
    module_ids = (modules["module_id"].astype(str).to_numpy() if "module_id" in modules
                  else np.arange(len(modules)).astype(str))
    summary = outputs.build_summary(
        modules=modules, anomalies=anomalies, module_spec=flight.module,
        inputs={**m.orthos_info.to_dict(), "manifest": str(flight.path),
                "layout": str(flight.flight.layout or "detected in the ortho"), "modules_without_data": no_data,
                "ortho_values": m.ortho_values},
        conditions=m.flight_conditions.to_dict(),
        validity=validity.to_dict(),
        registration=m.registration.to_dict(),
        layout_shift_m=m.shift,
        pipeline_path=settings.path, site=flight.site, flight=flight.flight,
        extra={"radiometry": {k: (v if np.ndim(v) == 0 or k == "band_um" else
                                  {"median": float(np.nanmedian(v)), "min": float(np.nanmin(v)),
                                   "max": float(np.nanmax(v))})
                              for k, v in m.radiometry.items()},
               "image_artefacts": m.seams.to_dict(module_ids),
               "layout": modules.attrs.get("layout", {}),
               "normalisation": Normalisation.from_settings(settings).to_dict(),
               "settings": run_settings(settings),
               "timings_s": {k: round(v, 3) for k, v in timings.items()}},
    )
    result = InspectionResult(out_dir=None, modules=modules.assign(**{c: table[c].to_numpy() for c in table}),
                              anomalies=anomalies, summary=summary, timings_s=timings)
    if out_dir is None:
        return result

    from pvscan.report._outputs import write_outputs

    t0 = _clock()

    def stage_done(name: str) -> None:
        nonlocal t0
        _record(timings, name, t0)
        t0 = _clock()

    with outputs.staging_dir(out_dir, overwrite=overwrite) as tmp:
        files = write_outputs(tmp, modules=modules, module_table=table, anomalies=anomalies, summary=summary,
                              settings=settings, flight=flight, report=report, progress=progress,
                              stage_done=stage_done, overview=m.overview)
    result.out_dir = out_dir
    result.files = {k: out_dir / v for k, v in files.items()}
    return result
