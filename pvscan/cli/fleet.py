"""``pvscan fleet FLIGHT.toml... --out DIR``: inspect many flights, one Dask task per flight."""
from __future__ import annotations

import sys
from pathlib import Path

import click

from pvscan.cli._common import EXIT_INPUT, Progress, echo, handle_errors, overwrite_option, pipeline_option


@click.command("fleet")
@click.argument("flights", nargs=-1, required=True, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Root folder: results go to OUT/<site>/<flight>/.")
@pipeline_option("Pipeline settings for every flight.")
@click.option("--scheduler", default="processes", show_default=True,
              help="synchronous, threads, processes, or a Dask scheduler address tcp://host:port.")
@click.option("--workers", type=click.IntRange(1, 1024), help="Local workers (default: all cores).")
@overwrite_option("Replace existing result folders.")
@click.option("--no-report", is_flag=True, help="Do not write report.html files.")
@handle_errors
def fleet_cmd(flights: tuple[Path, ...], out_dir: Path, pipeline_path: Path | None, scheduler: str,
              workers: int | None, overwrite: bool, no_report: bool) -> None:
    """Inspect many flights (FLIGHT.toml files) in parallel with Dask.

    A flight that fails is reported and leaves no result folder; the others go on. Exit
    code 1 when any flight failed. Two flights that would write the same result folder
    (same site and flight id) are refused before any starts.
    """
    from pvscan.fleet import inspect_fleet

    progress = Progress()
    try:
        outcomes = inspect_fleet(flights, out_dir, pipeline=pipeline_path, scheduler=scheduler,
                                 workers=workers, overwrite=overwrite, report=not no_report,
                                 progress=progress)
    finally:
        progress.close()
    failed = 0
    for o in outcomes:
        if o.ok:
            echo(f"ok      {o.manifest} -> {o.out_dir}  ({o.anomalies} anomalies, {o.power_loss_w:,.0f} W)")
            for w in o.warnings:
                click.echo(f"pvscan: warning: {w}", err=True)
        else:
            failed += 1
            click.echo(f"failed  {o.manifest}: {o.error}", err=True)
    echo(f"{len(outcomes) - failed} of {len(outcomes)} flights inspected; results under {out_dir}/")
    if failed:
        sys.exit(EXIT_INPUT)
