"""``pvscan history``: the site history across flights (add, list, changes, trend, maintenance)."""
from __future__ import annotations

from pathlib import Path

import click

from pvscan.cli._common import Progress, echo, handle_errors, overwrite_option, pipeline_option

_DB = click.argument("site_db", metavar="SITE.gpkg", type=click.Path(dir_okay=False, path_type=Path))


@click.group("history")
def history_group() -> None:
    """Site history: store inspected flights of one site and report what changed."""


@history_group.command("add")
@_DB
@click.argument("result_dir", metavar="RESULT_DIR",
                type=click.Path(file_okay=False, path_type=Path))
@click.option("--replace", is_flag=True,
              help="Replace a stored flight of the same id whose results differ.")
@pipeline_option("Pipeline settings file (its [history] section).")
@handle_errors
def add_cmd(site_db: Path, result_dir: Path, replace: bool, pipeline_path: Path | None) -> None:
    """Store the results of one `pvscan inspect` run (creates SITE.gpkg when needed)."""
    from pvscan.history import add_flight
    from pvscan.io.settings import load_pipeline

    cfg = load_pipeline(pipeline_path)["history"]
    progress = Progress()
    try:
        res = add_flight(site_db, result_dir, replace=replace, settings=cfg, progress=progress)
    finally:
        progress.close()
    if res.status == "unchanged":
        echo(f"flight {res.flight_id}: already stored with the same results; {site_db} unchanged")
        return
    what = "created site history with" if res.created else res.status
    echo(f"{site_db}: {what} flight {res.flight_id} "
         f"({res.n_modules} modules, {res.n_anomalies} anomalies)")
    if not res.layout.same:
        echo(f"layout: {res.layout.describe()}")


@history_group.command("list")
@_DB
@handle_errors
def list_cmd(site_db: Path) -> None:
    """List the flights stored, oldest first."""
    from pvscan.history import list_flights

    df = list_flights(site_db)
    if df.empty:
        echo(f"{site_db}: no flights stored")
        return
    echo(f"{'flight':<20} {'start':<26} {'modules':>7} {'anomalies':>9} {'loss kW':>8} "
         f"{'MWh/yr':>7}  layout")
    for r in df.to_dict("records"):
        p = r["total_power_loss_w"]
        e = r["total_energy_loss_kwh_per_year"]
        echo(f"{r['flight_id']:<20} {r['start']:<26} {r['n_modules']:>7} {r['n_anomalies']:>9} "
             f"{'' if p is None else f'{p / 1000:.2f}':>8} {'' if e is None else f'{e / 1000:.2f}':>7}"
             f"  {r['layout']}")


@history_group.command("changes")
@_DB
@click.option("--from", "flight_from", metavar="FLIGHT", help="Earlier flight id.")
@click.option("--to", "flight_to", metavar="FLIGHT", help="Later flight id.")
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="GeoJSON file to write (RFC 7946).")
@overwrite_option("Replace an existing --out file.")
@pipeline_option("Pipeline settings file (its [history] section).")
@handle_errors
def changes_cmd(site_db: Path, flight_from: str | None, flight_to: str | None, out_path: Path, overwrite: bool,
                pipeline_path: Path | None) -> None:
    """Module-by-module change between two flights (default: the two latest)."""
    from pvscan.history import CHANGE_CLASSES, compare_flights, write_changes
    from pvscan.io.settings import load_pipeline

    if out_path.exists() and not overwrite:  # before any work
        from pvscan.errors import OutputError

        raise OutputError(f"{out_path}: exists (use --overwrite to replace it)")
    cfg = load_pipeline(pipeline_path)["history"]
    fc = compare_flights(site_db, flight_from, flight_to, settings=cfg)
    write_changes(fc, out_path, overwrite=overwrite)
    c = fc["counts"]
    failed = [f["properties"] for f in fc["features"] if f["properties"]["change"] == "persists_after_repair"]
    echo(f"{fc['flight_before']['flight_id']} -> {fc['flight_after']['flight_id']}: "
         + ", ".join(f"{c[k]} {k.replace('_', ' ')}" for k in CHANGE_CLASSES)
         + f" ({c['repaired']} repaired, {c['suspicious']} resolved without a recorded repair)")
    if failed:
        echo(f"{len(failed)} defect(s) still there after a recorded repair or replacement (failed repairs):")
        for p in failed[:20]:
            ev = "; ".join(f"{e['date']} {e['action']}" + (f" ({e['note']})" if e.get("note") else "")
                           for e in p["maintenance_events"])
            echo(f"  {p['module_id']}: {p['defect_before']} -> {p['defect_after']}, "
                 f"dT norm {_k(p['delta_t_norm_k_before'])} -> {_k(p['delta_t_norm_k_after'])} K; "
                 f"maintenance {ev}")
        if len(failed) > 20:
            echo(f"  ... and {len(failed) - 20} more in {out_path}")
    if fc["not_compared"]:
        echo(f"{len(fc['not_compared'])} module(s) with an anomaly were not imaged in both flights "
             "(not compared)")
    if c["suspicious"] or failed:
        echo("check failed repairs and resolved defects without a repair on site before closing them; "
             "hot surfaces and live DC: work only by qualified people under local codes")
    echo(f"wrote {out_path}")


def _k(v: float | None) -> str:
    return "?" if v is None else f"{v:.1f}"


@history_group.command("trend")
@_DB
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Folder to write (CSV series and PNG plots).")
@overwrite_option("Replace an existing, non-empty folder.")
@pipeline_option("Pipeline settings file (its [history] section).")
@handle_errors
def trend_cmd(site_db: Path, out_dir: Path, overwrite: bool, pipeline_path: Path | None) -> None:
    """Counts, losses and temperatures per flight; per-module series."""
    from pvscan.history import site_trend, write_trend
    from pvscan.io.settings import load_pipeline

    trend = site_trend(site_db, settings=load_pipeline(pipeline_path))
    paths = write_trend(trend, out_dir, overwrite=overwrite)
    echo(f"{len(trend.flights)} flight(s); wrote {', '.join(p.name for p in paths)} to {out_dir}")


@history_group.command("degradation")
@_DB
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="CSV file to write (one row per module ever anomalous, one column per flight).")
@overwrite_option("Replace an existing --out file.")
@pipeline_option("Pipeline settings file (its [history] section).")
@handle_errors
def degradation_cmd(site_db: Path, out_path: Path, overwrite: bool, pipeline_path: Path | None) -> None:
    """Normalised delta T flight by flight and its rate of change per year (Theil-Sen) of every
    module that was ever anomalous."""
    import math

    from pvscan.history.degradation import module_degradation, write_degradation_csv
    from pvscan.io.settings import load_pipeline

    if out_path.exists() and not overwrite:  # before any work
        from pvscan.errors import OutputError

        raise OutputError(f"{out_path}: exists (use --overwrite to replace it)")
    deg = module_degradation(site_db, settings=load_pipeline(pipeline_path))
    write_degradation_csv(deg, out_path, overwrite=overwrite)
    m = deg.modules
    sloped = m[[not math.isnan(x) for x in m["slope_k_per_year"]]]
    echo(f"{len(m)} module(s) ever anomalous over {len(deg.flights)} flight(s); "
         f"{len(sloped)} with a slope (enough flights)")
    fastest = sloped.sort_values("slope_k_per_year", ascending=False).head(5)
    for r in fastest.to_dict("records"):
        if r["slope_k_per_year"] > 0:
            echo(f"  {r['module_id']}: {r['slope_k_per_year']:+.1f} K/yr "
                 f"({r['slope_low_k_per_year']:+.1f} to {r['slope_high_k_per_year']:+.1f}), "
                 f"last {r['delta_t_norm_k_last']:.1f} K, {r['defects']}")
    echo(f"wrote {out_path}")


@history_group.command("maintenance")
@_DB
@click.argument("events_csv", metavar="EVENTS.csv",
                type=click.Path(dir_okay=False, path_type=Path))
@handle_errors
def maintenance_cmd(site_db: Path, events_csv: Path) -> None:
    """Import repairs/replacements (CSV: date, module_id, action, note; `,` or `;`); idempotent."""
    from pvscan.history import import_maintenance

    res = import_maintenance(site_db, events_csv)
    echo(f"{events_csv}: {res.n_read} event(s), {res.n_added} new, {res.n_present} already stored")
