"""``pvscan layout detect|check``: a module layout from the ortho, and an audit of a layout."""
from __future__ import annotations

from pathlib import Path

import click

from pvscan.cli._common import echo, handle_errors, overwrite_option, pipeline_option


@click.group("layout")
def layout_group() -> None:
    """Find the module layout in the thermal ortho, or hold a layout against it."""


def _write(out_path: Path, layers: dict, overwrite: bool) -> None:
    from pvscan.errors import OutputError
    from pvscan.io.outputs import atomic_path

    if out_path.suffix.lower() != ".gpkg":
        raise OutputError(f"{out_path}: the layout is written as GeoPackage; use a .gpkg name")
    if out_path.exists() and not overwrite:
        raise OutputError(f"{out_path}: exists (use --overwrite to replace it)")
    with atomic_path(out_path, suffix=".tmp.gpkg") as tmp:
        for name, gdf in layers.items():
            gdf.reset_index(drop=True).to_file(tmp, layer=name, driver="GPKG", engine="pyogrio")


@layout_group.command("detect")
@click.argument("flight", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Detected layout (GeoPackage, ortho CRS; layers modules and tables; written atomically).")
@pipeline_option("Pipeline settings; uses [layout_detect].")
@overwrite_option("Replace an existing output file.")
@handle_errors
def detect_cmd(flight: Path, out_path: Path, pipeline_path: Path | None, overwrite: bool) -> None:
    """Find every table and module of FLIGHT.toml's ortho(s) from the module datasheet and
    write the module footprints to --out (usable as flight.layout).

    Ids: tables D<table row>-<table> (table rows from the lower-edge side, tables from the
    smallest easting); modules <table>-R<row>-C<col> (row 1 at the lower edge, col 1 at the
    smallest easting). A module partly on nodata or past the ortho's edge has status "cut".
    """
    from pvscan.io.manifest import load_flight
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline
    from pvscan.measure.layout_image import detect_layout

    fl = load_flight(flight, check_files=False)
    settings = load_pipeline(pipeline_path)
    with open_orthos(fl, settings=settings) as orthos:
        det = detect_layout(orthos, fl.module, fl.layout, settings)
    layers = {"modules": det.modules, "tables": det.tables}
    if len(det.dropped):
        layers["dropped_tables"] = det.dropped
    _write(out_path, layers, overwrite)
    s = det.summary()
    echo(f"found {s['tables']} tables, {s['modules']} modules ({s['modules_cut']} cut by nodata or the "
         f"ortho's edge); table confidence min {s['confidence_min']:.2f}, median {s['confidence_median']:.2f}")
    for r in det.tables[det.tables["status"] == "check"].itertuples():
        echo(f"check table {r.table_id}: confidence {r.confidence:.2f}, {r.rows} x {r.cols} {r.orientation}")
    if s["dropped_tables"]:
        echo(f"unsure: {s['dropped_tables']} lattices of {s['dropped_modules']} modules fitted but not kept "
             f"({100 * s['dropped_share']:.0f} % of the modules seen; layer dropped_tables): the layout may miss "
             f"tables there")
    lim = float(settings["layout_detect"]["max_uncovered_share"])
    if s["uncovered_share"] is not None and s["uncovered_share"] > lim:
        echo(f"incomplete: glass of about {s['uncovered_modules']:.0f} modules ({100 * s['uncovered_share']:.0f} % "
             f"of the plant's glass) lies outside the tables found (at most {100 * lim:g} %): check the layout "
             f"before use")
    echo(f"wrote {out_path}")


@layout_group.command("check")
@click.argument("flight", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Findings (GeoPackage: layer findings; with --fix also layout).")
@click.option("--fix", is_flag=True, help="Also write the corrected layout (layer layout), keeping the "
              "layout's ids and attributes of matched modules.")
@pipeline_option("Pipeline settings; uses [layout_detect].")
@overwrite_option("Replace an existing output file.")
@handle_errors
def check_cmd(flight: Path, out_path: Path, fix: bool, pipeline_path: Path | None, overwrite: bool) -> None:
    """Hold the layout of FLIGHT.toml against the modules found in its ortho: modules
    missing from the layout, layout modules with no module under them, tables moved or turned.
    """
    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline, section
    from pvscan.measure.layout_image import check_layout, corrected_layout, detect_layout

    fl = load_flight(flight)
    settings = load_pipeline(pipeline_path)
    with open_orthos(fl, settings=settings) as orthos:
        layout = read_layout(fl, orthos.crs)
        det = detect_layout(orthos, fl.module, fl.layout, settings)
    chk = check_layout(layout, det.modules, dict(section(settings, "layout_detect")))
    layers = {"findings": chk.findings}
    if fix:
        layers["layout"] = corrected_layout(layout, det.modules, chk)
    _write(out_path, layers, overwrite)
    c = chk.counts()
    dx, dy = chk.common_shift_m
    echo(f"layout {len(layout)} modules, image {len(det.modules)} modules; common shift "
         f"{dx:+.2f} m east, {dy:+.2f} m north")
    echo(f"missing from the layout: {c['missing_from_layout']}; no module found under: {c['no_module_found']}; "
         f"tables moved: {c['table_moved']}; turned: {c['table_turned']}")
    for r in chk.findings[chk.findings["finding"].isin(["table_moved", "table_turned"])].itertuples():
        echo(f"  {r.table_id}: {r.detail}")
    echo(f"wrote {out_path}" + (" (findings, corrected layout)" if fix else " (findings)"))


@layout_group.command("score")
@click.argument("truth_dir", type=click.Path(file_okay=False, path_type=Path))
@click.argument("layout_path", type=click.Path(dir_okay=False, path_type=Path))
@pipeline_option("Pipeline settings; [evaluate] match_distance_m.")
@handle_errors
def score_cmd(truth_dir: Path, layout_path: Path, pipeline_path: Path | None) -> None:
    """Score a detected layout against the truth of a simulated flight (TRUTH_DIR): modules
    found, extra, corner error."""
    from pvscan.evaluate import evaluate_layout
    from pvscan.io.settings import load_pipeline

    s = evaluate_layout(truth_dir, layout_path, load_pipeline(pipeline_path)["evaluate"])
    echo(f"truth {s['truth_modules']} modules, layout {s['layout_modules']}")
    echo(f"found {s['found']} ({100 * s['found_fraction']:.1f} %), extra {s['extra']}")
    ce = s["corner_error_m"]
    if ce:
        echo(f"corner error [m]: median {ce['median']:.3f}, p95 {ce['p95']:.3f}, max {ce['max']:.3f}; "
             f"within 5 cm {100 * s['within_5cm']:.1f} %")
