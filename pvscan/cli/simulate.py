"""``pvscan simulate SCENARIO.toml --out DIR``: write a synthetic flight with its ground truth."""
from __future__ import annotations

from pathlib import Path

import click

from pvscan.cli._common import Progress, echo, handle_errors


@click.command("simulate")
@click.argument("scenario", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Flight folder to write (must not exist unless --overwrite).")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True,
              help="Seed of every random choice; the same seed gives identical files.")
@click.option("--overwrite", is_flag=True, help="Replace an existing simulated flight folder.")
@click.option("--date", "flight_date", default=None, metavar="YYYY-MM-DD",
              help="Fly on this date instead of the scenario's (time of day and UTC offset kept).")
@click.option("--flight-id", default=None, help="Flight id written into flight.toml and the truth.")
@handle_errors
def simulate_cmd(scenario, out_dir, seed, overwrite, flight_date, flight_id):
    """Simulate a drone thermal flight of the invented plant in SCENARIO.toml.

    Writes the ortho GeoTIFF(s), the layout, flight.toml (ready for `pvscan inspect`),
    weather.csv and frames.geojson when conditions vary, truth.geojson / truth.json (the
    ground truth, for `pvscan evaluate`), truth_ortho.geojson (the modules where the ortho
    shows them) and preview.png. --date and --flight-id make a second flight of the same
    site without editing the scenario.
    """
    from pvscan.simulate import load_scenario, simulate_flight, with_flight

    sc = scenario
    if flight_date is not None or flight_id is not None:
        sc = with_flight(load_scenario(scenario), date=flight_date, flight_id=flight_id)
    progress = Progress()
    try:
        res = simulate_flight(sc, out_dir, seed=seed, overwrite=overwrite, progress=progress)
    finally:
        progress.close()
    parts = ", ".join(f"{n} {k}" for k, n in res.defects.items() if n)
    echo(f"simulated {res.n_modules} modules, {res.n_defective} defective ({parts or 'none'})")
    echo(f"flight: {res.manifest}")
    echo(f"truth:  {res.truth}")
    echo(f"preview: {res.preview}")
