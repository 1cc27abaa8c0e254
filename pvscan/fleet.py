"""Many flights at once: run :func:`pvscan.pipeline.inspect_flight` over a fleet with Dask.

One laptop inspects one flight in well under a minute per few thousand modules; a fleet of
plants flown in one season is many such flights, independent of each other. This module
turns each flight into one Dask task, so the same call runs them one after the other
(``scheduler="synchronous"``), on the local cores (``"processes"``, the default) or on a
Dask cluster (``scheduler="tcp://host:8786"``, needs the ``distributed`` package). Each
flight's results go to ``<out_dir>/<site id>/<flight id>/`` and are written atomically, so
a failed flight leaves no partial folder and does not stop the others.
"""
from __future__ import annotations

import logging
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from os import PathLike
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pvscan.errors import FleetError, PvscanError

if TYPE_CHECKING:
    from pvscan.io.manifest import Flight

__all__ = ["FlightOutcome", "inspect_fleet", "result_folder"]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class FlightOutcome:
    """What happened to one flight of a fleet run.

    Attributes
    ----------
    manifest : str
        The flight's ``flight.toml``.
    out_dir : str or None
        Its result folder (None when it failed).
    ok : bool
    error : str
        One-line error message when it failed.
    anomalies : int
        Number of anomalies found.
    power_loss_w : float
        Total power loss at STC [W].
    warnings : tuple of str
        Warnings recorded in the flight's ``summary.json`` (e.g. what the layout lacks).
    """

    manifest: str
    out_dir: str | None
    ok: bool
    error: str = ""
    anomalies: int = 0
    power_loss_w: float = 0.0
    warnings: tuple[str, ...] = ()


def _slug(text: str) -> str:
    s = re.sub(r"[^A-Za-z0-9._-]+", "-", text.strip()).strip("-.")
    return s or "site"


def result_folder(out_dir: Path, flight: Flight) -> Path:
    """``<out_dir>/<site id>/<flight id>`` with file-system-safe names."""
    return Path(out_dir) / _slug(flight.site.id or flight.site.name) / _slug(flight.flight.id)


def _check_result_folders(manifests: list[str], out_dir: Path) -> None:
    """Refuse, before any flight starts, two flights that would write the same result folder
    (same site and flight id): one would silently replace the other. Manifests that do not
    load are left to their task, which reports them as failed."""
    from pvscan.io.manifest import load_flight

    seen: dict[str, str] = {}
    for m in manifests:
        try:
            flight = load_flight(m, check_files=False)
        except PvscanError:
            continue
        folder = result_folder(out_dir, flight)
        key = str(folder.resolve()).casefold()  # case-insensitive file systems fold names
        if key in seen:
            raise FleetError(
                f"{seen[key]} and {m} would both write {folder} (site {flight.site.id or flight.site.name!r}, "
                f"flight {flight.flight.id!r}); give one of them another [flight] id; no flight was started")
        seen[key] = m


def _inspect_one(manifest: str, out_dir: str, pipeline_path: str | None, overwrite: bool,
                 report: bool) -> FlightOutcome:
    from pvscan.io.manifest import load_flight
    from pvscan.io.settings import load_pipeline
    from pvscan.pipeline import inspect_flight

    try:
        flight = load_flight(manifest)
        settings = load_pipeline(pipeline_path)
        folder = result_folder(Path(out_dir), flight)
        res = inspect_flight(flight, settings, folder, overwrite=overwrite, report=report)
        layout = res.summary.get("layout") or {}
        return FlightOutcome(manifest=manifest, out_dir=str(folder), ok=True,
                             anomalies=int(len(res.anomalies)),
                             power_loss_w=float(res.summary.get("power_loss_w", 0.0)),
                             warnings=tuple(str(w) for w in layout.get("warnings") or ()))
    except PvscanError as exc:
        return FlightOutcome(manifest=manifest, out_dir=None, ok=False, error=" ".join(str(exc).split()))


def inspect_fleet(manifests: Sequence[str | PathLike[str]], out_dir: str | PathLike[str], *,
                  pipeline: str | PathLike[str] | None = None, scheduler: str = "processes",
                  workers: int | None = None, overwrite: bool = False, report: bool = True,
                  progress: Callable[[str, int, int], None] | None = None) -> list[FlightOutcome]:
    """Inspect many flights, one Dask task per flight.

    Parameters
    ----------
    manifests : sequence of path-like
        ``flight.toml`` files.
    out_dir : path-like
        Root of the results: ``<out_dir>/<site id>/<flight id>/``.
    pipeline : path-like, optional
        Pipeline settings for every flight.
    scheduler : str
        ``"synchronous"``, ``"threads"``, ``"processes"`` (local cores), or the address of a
        Dask scheduler (``"tcp://..."``; needs ``distributed``).
    workers : int, optional
        Local workers for ``"threads"``/``"processes"`` (default: the number of cores).
    overwrite : bool
        Replace existing result folders.
    report : bool
        Write each flight's ``report.html``.
    progress : callable, optional
        ``progress("fleet", done, total)``.

    Returns
    -------
    list of FlightOutcome
        In the order of ``manifests``; failed flights carry their one-line error.

    Raises
    ------
    FleetError
        Before any flight starts, when a manifest is given twice or two flights would write
        the same result folder (same site and flight id).
    """
    import dask

    from pvscan.tasks import cluster, is_address

    paths = [str(Path(m)) for m in manifests]
    same = sorted({m for m in paths if paths.count(m) > 1})
    if same:
        raise FleetError(f"{same[0]} is given more than once; no flight was started")
    _check_result_folders(paths, Path(out_dir))
    pipeline = None if pipeline is None else str(pipeline)
    total = len(paths)
    if progress is not None:
        progress("fleet", 0, total)
    task = dask.delayed(_inspect_one, pure=False)
    tasks = [task(m, str(out_dir), pipeline, overwrite, report) for m in paths]
    if is_address(scheduler):
        # one task per flight on the cluster; each flight runs embedded on its worker
        with cluster(scheduler) as client:
            outcomes = list(client.gather(client.compute(tasks)))
    elif scheduler in ("synchronous", "threads", "processes"):
        kw: dict[str, Any] = {"scheduler": scheduler}
        if workers and scheduler != "synchronous":
            kw["num_workers"] = int(workers)
        outcomes = list(dask.compute(*tasks, **kw))
    else:
        raise PvscanError(f"scheduler {scheduler!r}: use synchronous, threads, processes or tcp://host:port")
    if progress is not None:
        progress("fleet", total, total)
    for o in outcomes:
        if not o.ok:
            log.warning("%s: %s", o.manifest, o.error)
    return outcomes
