"""``pvscan evaluate TRUTH_DIR RESULT_DIR``: score a result against a simulated flight's truth."""
from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import click

from pvscan.cli._common import echo, handle_errors, pipeline_option


@click.command("evaluate")
@click.argument("truth_dir", type=click.Path(path_type=Path))
@click.argument("result_dir", type=click.Path(file_okay=False, path_type=Path))
@click.option("--json", "json_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Also write the scores to this JSON file.")
@pipeline_option("Pipeline settings whose [evaluate] section sets the module matching.")
@click.option("--force", is_flag=True,
              help="Score a truth and a result of different flights (site, flight id, start) anyway.")
@handle_errors
def evaluate_cmd(truth_dir: Path, result_dir: Path, json_path: Path | None, pipeline_path: Path | None,
                 force: bool) -> None:
    """Score RESULT_DIR (from `pvscan inspect`) against TRUTH_DIR (from `pvscan simulate`).

    Prints detection precision/recall, per-class recall, the confusion matrix, false alarms,
    power-loss and temperature errors. Refuses a truth and a result of different flights
    (site, flight id or start time) unless --force is given.
    """
    from pvscan.evaluate import evaluate, format_report
    from pvscan.io.outputs import atomic_write
    from pvscan.io.settings import load_pipeline

    scores = evaluate(truth_dir, result_dir, load_pipeline(pipeline_path)["evaluate"], force=force)
    if scores["flight_check"]["forced"]:
        click.echo("pvscan: warning: truth and result are of different flights: "
                   + "; ".join(scores["flight_check"]["differences"]), err=True)
    if json_path is not None:
        try:
            json_path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            from pvscan.errors import OutputError

            raise OutputError(f"{json_path.parent}: cannot create the folder: {exc.strerror or exc}") from None
        atomic_write(json_path, json.dumps(scores, indent=2))
    echo(format_report(_rounded(scores)))


def _rounded(value: Any, decimals: int = 3) -> Any:
    """A copy of the scores with every float rounded for printing (``-0.0`` shown as ``0.0``);
    the JSON file keeps full precision."""
    if isinstance(value, float):
        return round(value, decimals) + 0.0
    if isinstance(value, dict):
        return {k: _rounded(v, decimals) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return type(value)(_rounded(v, decimals) for v in value)
    return value
