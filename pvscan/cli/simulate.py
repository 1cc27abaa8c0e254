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
@handle_errors
def simulate_cmd(scenario, out_dir, seed, overwrite):
    """Simulate a drone thermal flight of the invented plant in SCENARIO.toml.

    Writes the ortho GeoTIFF(s), the layout, flight.toml (ready for `pvscan inspect`),
    weather.csv and frames.geojson when conditions vary, truth.geojson / truth.json (the
    ground truth, for `pvscan evaluate`) and preview.png.
    """
    from pvscan.simulate import simulate_flight

    progress = Progress()
    try:
        res = simulate_flight(scenario, out_dir, seed=seed, overwrite=overwrite, progress=progress)
    finally:
        progress.close()
    parts = ", ".join(f"{n} {k}" for k, n in res.defects.items() if n)
    echo(f"simulated {res.n_modules} modules, {res.n_defective} defective ({parts or 'none'})")
    echo(f"flight: {res.manifest}")
    echo(f"truth:  {res.truth}")
    echo(f"preview: {res.preview}")
