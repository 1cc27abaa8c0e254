"""``pvscan inspect FLIGHT.toml --out DIR``: run the post-flight pipeline on one flight."""
from __future__ import annotations

from pathlib import Path

import click

from pvscan.cli._common import Progress, echo, handle_errors, overwrite_option, pipeline_option


@click.command("inspect")
@click.argument("flight", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Result folder (written atomically; must not exist unless --overwrite).")
@pipeline_option("Pipeline settings (a tuned copy of pipelines/post_flight.toml).")
@overwrite_option("Replace an existing result folder.")
@click.option("--no-report", is_flag=True, help="Do not write report.html.")
@click.option("--shift", "shift", type=float, nargs=2, default=None, metavar="DX DY",
              help="Use this known layout offset (east, north in the ortho's CRS) [m] instead of the measured one.")
@click.option("--accept-poor-registration", is_flag=True,
              help="Run on when the layout cannot be placed on the modules (or only up to one module pitch); "
                   "the result is marked invalid "
                   "(validity.ok false) and every finding gets the lowest confidence.")
@click.option("--scheduler", default="single", show_default=True,
              help="Where the block statistics run: single (this process), threads or processes "
                   "(local cores), or a Dask scheduler address tcp://host:port (workers must see the "
                   "flight's files by the same paths).")
@handle_errors
def inspect_cmd(flight: Path, out_dir: Path, pipeline_path: Path | None, overwrite: bool, no_report: bool,
                scheduler: str, shift: tuple[float, float] | None, accept_poor_registration: bool) -> None:
    """Find, classify and rank faulty modules of one flight (FLIGHT.toml) into --out DIR.

    Writes modules.geojson, anomalies.geojson, workorders.csv, pvscan.gpkg, summary.json and
    report.html. Exit codes: 0 success, 1 bad input or a layout that cannot be placed on the
    ortho's modules, or only up to one module pitch (see --shift, --accept-poor-registration,
    `pvscan align`), 2 usage error,
    3 internal error.
    """
    from pvscan.io.manifest import load_flight
    from pvscan.io.settings import load_pipeline
    from pvscan.pipeline import inspect_flight
    from pvscan.tasks import parse_scheduler

    sched = parse_scheduler(scheduler)
    fl = load_flight(flight)
    settings = load_pipeline(pipeline_path)
    echo(f"pvscan: inspecting {fl.site.name}, flight {fl.flight.id} ({len(fl.flight.orthos)} ortho tile(s))",
         err=True, level=1)
    if fl.flight.layout is None:
        echo("pvscan: no flight.layout: detecting the module layout in the ortho first (no string ids: "
             "open_string and pid are not looked for)", err=True)
    progress = Progress()
    try:
        result = inspect_flight(fl, settings, out_dir, overwrite=overwrite, report=not no_report,
                                progress=progress, scheduler=sched, shift=(shift[0], shift[1]) if shift else None,
                                accept_poor_registration=accept_poor_registration)
    finally:
        progress.close()
    from pvscan.cli._summary import print_inspection_summary

    if result.out_dir is not None:
        print_inspection_summary(result.out_dir, top=int(settings["report"]["summary_top"]))
