"""``pvscan simulate SCENARIO.toml --out DIR`` or ``pvscan simulate --random SEED --out DIR``:
write a synthetic flight with its ground truth."""
from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

import click

from pvscan.cli._common import Progress, echo, handle_errors, overwrite_option

if TYPE_CHECKING:
    from pvscan.simulate import SimulationResult


@click.command("simulate")
@click.argument("scenario", required=False, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Flight folder to write (must not exist unless --overwrite).")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True,
              help="Seed of every random choice; the same seed gives identical files.")
@overwrite_option("Replace an existing simulated flight folder.")
@click.option("--date", "flight_date", default=None, metavar="YYYY-MM-DD",
              help="Fly on this date instead of the scenario's (time of day and UTC offset kept).")
@click.option("--flight-id", default=None, help="Flight id written into flight.toml and the truth.")
@click.option("--random", "random_seed", type=click.IntRange(min=0), default=None, metavar="SEED",
              help="Draw a whole random flight from documented ranges instead of a SCENARIO.")
@click.option("--family", default="any", show_default=True,
              help="Family of the random flight: any, fixed, tracker, tracker_hot_ground_noon, "
                   "raised_low_sun, cold_ground, turned_layout, no_layout_error, small_site, large_site.")
@handle_errors
def simulate_cmd(scenario: Path | None, out_dir: Path, seed: int, overwrite: bool, flight_date: str | None,
                 flight_id: str | None, random_seed: int | None, family: str) -> None:
    """Simulate a drone thermal flight of the invented plant in SCENARIO.toml.

    Writes the ortho GeoTIFF(s), the layout, flight.toml (ready for `pvscan inspect`),
    weather.csv and frames.geojson when conditions vary, truth.geojson / truth.json (the
    ground truth, for `pvscan evaluate`), truth_ortho.geojson (the modules where the ortho
    shows them) and preview.png. --date and --flight-id make a second flight of the same
    site without editing the scenario.
    """
    from pvscan.simulate import load_scenario, simulate_flight, simulate_random, with_flight

    if (scenario is None) == (random_seed is None):
        raise click.UsageError("give either a SCENARIO file or --random SEED")
    if random_seed is not None:
        if flight_date is not None or flight_id is not None:
            raise click.UsageError("--date and --flight-id apply to a SCENARIO file, not to --random")
        progress = Progress()
        try:
            res = simulate_random(random_seed, out_dir, family, overwrite=overwrite, progress=progress)
        finally:
            progress.close()
        _report(res)
        echo(f"scenario: {res.out_dir / 'scenario.toml'} (replay with --seed {random_seed})")
        return
    assert scenario is not None  # one of the two, checked above
    sc: Path | dict[str, Any] = scenario
    if flight_date is not None or flight_id is not None:
        sc = with_flight(load_scenario(scenario), date=flight_date, flight_id=flight_id)
    progress = Progress()
    try:
        res = simulate_flight(sc, out_dir, seed=seed, overwrite=overwrite, progress=progress)
    finally:
        progress.close()
    _report(res)


def _report(res: SimulationResult) -> None:
    parts = ", ".join(f"{n} {k}" for k, n in res.defects.items() if n)
    echo(f"simulated {res.n_modules} modules, {res.n_defective} defective ({parts or 'none'})")
    echo(f"flight: {res.manifest}")
    echo(f"truth:  {res.truth}")
    echo(f"preview: {res.preview}")
