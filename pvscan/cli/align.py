"""``pvscan align FLIGHT.toml --out corrected_layout.gpkg``: fit the layout onto the ortho."""
from __future__ import annotations

import math
from pathlib import Path

import click

from pvscan.cli._common import Progress, echo, handle_errors


def _fmt(v: float, nd: int = 3) -> str:
    return "    n/a" if not math.isfinite(v) else f"{v:+.{nd}f}"


@click.command("align")
@click.argument("flight", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Corrected layout (GeoPackage, ortho CRS; written atomically).")
@click.option("--pipeline", "pipeline_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Pipeline settings (a tuned copy of pipelines/post_flight.toml); uses [register].")
@click.option("--overwrite", is_flag=True, help="Replace an existing output file.")
@handle_errors
def align_cmd(flight, out_path, pipeline_path, overwrite):
    """Measure the offset of the layout against the orthomosaic of FLIGHT.toml and write the
    moved module footprints (with all their properties) to --out.

    Prints the shift of every block and the overall shift and confidence. The shift is
    east/north in the ortho's CRS [m], to be added to the layout. Exit codes: 0 success,
    1 bad input, 2 usage error, 3 internal error.
    """
    from pvscan.io.manifest import load_flight
    from pvscan.measure.register import align_flight
    from pvscan.io.settings import load_pipeline

    fl = load_flight(flight)
    settings = load_pipeline(pipeline_path)
    echo(f"pvscan: aligning the layout of {fl.site.name}, flight {fl.flight.id} "
         f"({len(fl.flight.orthos)} ortho tile(s))", err=True, level=1)
    progress = Progress()
    try:
        reg, moved = align_flight(fl, settings, out_path, overwrite=overwrite, progress=progress)
    finally:
        progress.close()

    echo("block  tile       x [m]        y [m]     dx [m]   dy [m]  conf  used  note")
    for k, b in enumerate(reg.blocks, 1):
        echo(f"{k:>5}  {b.tile:>4}  {b.x:>11.1f}  {b.y:>11.1f}  {_fmt(b.dx)}  {_fmt(b.dy)}  "
             f"{b.confidence:4.2f}  {'yes' if b.used else 'no ':>4}  {b.note}")
    for note in reg.notes:
        echo(f"note: {note}")
    mx, my = reg.measured_m
    echo(f"measured shift: dx = {_fmt(mx)} m, dy = {_fmt(my)} m (east, north), "
         f"confidence {reg.confidence:.2f}")
    if math.isfinite(reg.residual_rotation_deg):
        echo(f"residual rotation {reg.residual_rotation_deg:+.4f} deg, scale {reg.residual_scale:.6f}")
    sx, sy = reg.shift_m
    echo(f"applied shift:  dx = {_fmt(sx)} m, dy = {_fmt(sy)} m" + ("" if reg.applied else " (none)"))
    echo(reg.message)
    echo(f"wrote {out_path} ({len(moved)} modules)")
