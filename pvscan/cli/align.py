"""``pvscan align FLIGHT.toml --out corrected_layout.gpkg|.geojson``: fit the layout onto the ortho."""
from __future__ import annotations

import math
from pathlib import Path

import click

from pvscan.cli._common import Progress, echo, handle_errors, overwrite_option, pipeline_option


def _fmt(v: float, nd: int = 3) -> str:
    return "    n/a" if not math.isfinite(v) else f"{v:+.{nd}f}"


@click.command("align")
@click.argument("flight", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Corrected layout: .gpkg (GeoPackage, ortho CRS) or .geojson (RFC 7946 lon/lat); written "
                   "atomically, without the internal module-frame columns.")
@pipeline_option("Pipeline settings (a tuned copy of pipelines/post_flight.toml); uses [register].")
@overwrite_option("Replace an existing output file.")
@handle_errors
def align_cmd(flight: Path, out_path: Path, pipeline_path: Path | None, overwrite: bool) -> None:
    """Place the layout of FLIGHT.toml on its orthomosaic (shift, rotation, scale) and write
    the placed module footprints (with the layout's properties) to --out.

    Prints the shift each correlation block measured, the placement used and the module
    evidence of the drawn layout and of each proposal. The shift is east/north in the
    ortho's CRS [m], added to the layout (at the site centre when rotated or scaled). Exit
    codes: 0 success, 1 bad input or a layout that cannot be placed on the modules, 2 usage
    error, 3 internal error.
    """
    from pvscan.errors import RegistrationError
    from pvscan.io.manifest import load_flight
    from pvscan.io.settings import load_pipeline
    from pvscan.measure.register import align_layout

    fl = load_flight(flight)
    settings = load_pipeline(pipeline_path)
    echo(f"pvscan: aligning the layout of {fl.site.name}, flight {fl.flight.id} "
         f"({len(fl.flight.orthos)} ortho tile(s))", err=True, level=1)
    progress = Progress()
    try:
        reg, moved = align_layout(fl, settings, out_path, overwrite=overwrite, progress=progress)
    finally:
        progress.close()

    echo("block  tile       x [m]        y [m]     dx [m]   dy [m]  conf  used  note")
    for k, b in enumerate(reg.blocks, 1):
        echo(f"{k:>5}  {b.tile:>4}  {b.x:>11.1f}  {b.y:>11.1f}  {_fmt(b.dx)}  {_fmt(b.dy)}  "
             f"{b.confidence:4.2f}  {'yes' if b.used else 'no ':>4}  {b.note}")
    for note in reg.notes:
        echo(f"note: {note}")
    mx, my = reg.measured_m
    echo(f"measured shift: dx = {_fmt(mx)} m, dy = {_fmt(my)} m (east, north; block correlation), "
         f"confidence {reg.confidence:.2f}")
    drawn = reg.evidence.get("drawn") or {}
    if drawn:
        echo(f"layout as drawn: module evidence {drawn.get('evidence', float('nan')):.3f}, probe ratios "
             f"{drawn.get('ratio_u', float('nan')):.2f}, {drawn.get('ratio_v', float('nan')):.2f}")
    for k, p in enumerate(reg.evidence.get("proposals") or [], 1):
        echo(f"proposal {k}: shift ({p['shift_m'][0]:+.3f}, {p['shift_m'][1]:+.3f}) m, rotation "
             f"{p['rotation_deg']:+.4f} deg, scale {p['scale']:.6f}: module evidence {p['evidence']:.3f}, probe "
             f"ratios {p['ratio_u']:.2f}, {p['ratio_v']:.2f}{'' if p['ok'] else ' (not on the modules)'}")
    sx, sy = reg.shift_m
    echo(f"applied shift:  dx = {_fmt(sx)} m, dy = {_fmt(sy)} m" + ("" if reg.applied else " (none)"))
    echo(reg.message)
    if reg.status == "failed":
        raise RegistrationError(f"{fl.flight.layout}: {reg.message}; nothing written")
    echo(f"wrote {out_path} ({len(moved)} modules)")
