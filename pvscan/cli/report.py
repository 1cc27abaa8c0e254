"""``pvscan report RESULT_DIR``: (re)write the self-contained report.html of a result folder."""
from __future__ import annotations

from pathlib import Path

import click

from pvscan.cli._common import Progress, echo, handle_errors, pipeline_option


@click.command("report")
@click.argument("result_dir", type=click.Path(file_okay=False, path_type=Path))
@click.option("--out", "out_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Where to write the report (default: RESULT_DIR/report.html, replaced).")
@click.option("--ortho", "orthos", multiple=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Thermal ortho tile(s) to draw, when the result folder moved away from them "
                   "(repeat for several tiles; units from the flight manifest when it is found, else degC).")
@pipeline_option("Pipeline settings whose [report] section to use.")
@handle_errors
def report_cmd(result_dir: Path, out_path: Path | None, orthos: tuple[Path, ...], pipeline_path: Path | None) -> None:
    """Write report.html for RESULT_DIR (a folder written by `pvscan inspect`).

    The report is one HTML file with its images embedded: it opens in any browser, offline,
    and prints cleanly. The thermal ortho named in summary.json is read for the map and
    the anomaly crops; without it the map shows module temperatures.
    """
    from pvscan.io.settings import load_pipeline
    from pvscan.report import write_report

    settings = load_pipeline(pipeline_path)["report"]
    progress = Progress()
    try:
        path = write_report(result_dir, out_path, settings=settings, ortho_paths=list(orthos) or None,
                            progress=progress)
    finally:
        progress.close()
    echo(f"report written: {path}")
