"""The one-screen end-of-run summary of ``pvscan inspect`` (about 30 lines)."""
from __future__ import annotations

import math
import os
import textwrap
from pathlib import Path
from typing import SupportsFloat

import click

__all__ = ["print_inspection_summary", "summary_lines"]

_WIDTH = 96


def _f(v: SupportsFloat | str | None, digits: int = 0, unit: str = "") -> str:
    if v is None:
        return "-"
    try:
        x = float(v)
    except (TypeError, ValueError):
        return "-"
    if not math.isfinite(x):
        return "-"
    return f"{x:,.{digits}f}{(' ' + unit) if unit else ''}"


def _cut(s: str, n: int = _WIDTH) -> str:
    return s if len(s) <= n else s[: n - 3] + "..."


def _wrap(text: str, indent: str = "  ", first: str = "") -> list[str]:
    """``text`` in lines of at most ``_WIDTH`` columns, broken at spaces only: a file name or
    path is never cut or hyphenated (one longer than a line stands alone on its line)."""
    return textwrap.wrap(text, _WIDTH, initial_indent=first, subsequent_indent=indent,
                         break_long_words=False, break_on_hyphens=False) or [first + text]


#: Result files in the order the summary names them, grouped by use.
_RESULT_FILES: tuple[tuple[str, tuple[str, ...]], ...] = (
    ("", ("report.html", "summary.json")),
    ("field: ", ("workorders.csv", "workorders.gpx")),
    ("GIS: ", ("anomalies.geojson", "modules.geojson", "pvscan.gpkg")),
)


def _file_lines(root: Path) -> list[str]:
    """Where the results are and which files the folder holds: on one line where they fit,
    else one group a line, wrapped between names."""
    lines = [f"results in {root}/"] if len(f"results in {root}/") <= _WIDTH else ["results in", f"  {root}/"]
    present = sorted(p.name for p in root.iterdir() if p.is_file() and not p.name.startswith(".")) \
        if root.is_dir() else []
    named = {n for _, names in _RESULT_FILES for n in names}
    parts = []
    for label, names in _RESULT_FILES:
        found = [n for n in names if n in present]
        if found:
            parts.append(label + ", ".join(found))
    others = [n for n in present if n not in named]
    if others:
        parts.append("also: " + ", ".join(others))
    if parts and len("  " + "; ".join(parts)) <= _WIDTH:
        lines.append("  " + "; ".join(parts))
    else:  # one group a line, a long group wrapped between its names
        for part in parts:
            lines.extend(_wrap(part, indent="    ", first="  "))
    return lines


def summary_lines(result_dir: str | os.PathLike[str], top: int | None = None) -> list[str]:
    """The summary as a list of lines (see :func:`print_inspection_summary`); ``top`` work
    orders listed (default: ``[report] summary_top`` of the default pipeline)."""
    from pvscan.io.settings import load_pipeline
    from pvscan.report import SEVERITIES, detection_limit, load_result, validity_checks

    if top is None:
        top = int(load_pipeline()["report"]["summary_top"])
    data = load_result(result_dir)
    an = data.anomalies
    tot = data.totals()
    lines: list[str] = []
    head = f"pvscan: {data.site_name}"
    if data.flight_id:
        head += f", flight {data.flight_id}"
    if data.flight_start:
        head += f" ({data.flight_start[:16].replace('T', ' ')})"
    lines.append(_cut(head))
    lines.append("-" * min(_WIDTH, max(40, len(lines[0]))))
    sev = an["severity"].value_counts() if len(an) else {}
    sev_txt = ", ".join(f"{int(sev.get(s, 0))} {s}" for s in SEVERITIES)
    lines.append(f"modules {int(tot['n_modules']):,}   anomalies {int(tot['n_anomalies'])} ({sev_txt})")
    share = tot["plant_share"]
    loss = f"power loss {_f(tot['power_loss_w'], 0, 'W')} at STC"
    if math.isfinite(share):
        loss += f" ({share * 100:.2f} % of plant)"
    loss += f"   energy loss {_f(tot['energy_loss_kwh_per_year'], 0, 'kWh/yr')}"
    if math.isfinite(tot["yearly_cost"]) and tot["currency"]:
        loss += f" (~{_f(tot['yearly_cost'], 0)} {tot['currency']}/yr)"
    lines.append(_cut(loss))
    counts = data.counts()
    if len(counts):
        lines.append("by defect:")
        items = [f"{str(d).replace('_', ' ')} {int(r['total'])}" for d, r in counts.iterrows()]
        row = "  "
        for it in items:
            if len(row) + len(it) + 3 > _WIDTH:
                lines.append(row.rstrip(" ·"))
                row = "  "
            row += it + " · "
        lines.append(row.rstrip(" ·"))
    if len(an) and top > 0:
        lines.append(f"top {min(top, len(an))} work orders:")
        for k, r in an.head(top).iterrows():
            prio = int(r["priority"]) if _f(r["priority"]) != "-" else k + 1
            act = str(r.get("action") or "")
            act = act if act and act != "nan" else ""
            act = act.split(". ")[0].split("; ")[0].rstrip(".")
            head, sep, rest = act.partition(": ")
            if sep and len(head) <= 24 and rest:  # "Urgent (safety): ..." - the severity is shown
                act = rest[:1].upper() + rest[1:]
            s = (f"  {prio:>2} {str(r['severity']):<7} {str(r['module_id']):<14} "
                 f"{str(r['defect']).replace('_', ' '):<22} dT {_f(r['delta_t_k'], 1, 'K'):>7} "
                 f"{_f(r['power_loss_w'], 0, 'W'):>7}  {act}")
            lines.append(_cut(s.rstrip()))
        if len(an) > top:
            lines.append(f"  ... {len(an) - top} more in workorders.csv")
    checks, ok = validity_checks(data.summary)
    failed = [c for c in checks if c["passed"] is False]
    raw_checks = {c.get("name"): c for c in ((data.summary.get("validity") or {}).get("checks") or [])
                  if isinstance(c, dict)}
    if ok is False or failed:
        lines.append("RESULT NOT VALID: checks failed (findings less certain; see summary.json validity):")
        for c in failed[:5]:
            msg = raw_checks.get(c["name"], {}).get("message")
            if not msg:
                unit = f" {c['unit']}" if c["unit"] else ""
                rel = {"min": ">=", "max": "<="}.get(c["kind"] or "", "limit")
                msg = (f"{str(c['name']).replace('_', ' ')}: {_f(c['value'], 3)}{unit} "
                       f"(needs {rel} {_f(c['limit'], 3)}{unit}; {c['source'] or 'see summary.json'})")
            lines.extend(textwrap.wrap(f"  ! {msg}", _WIDTH, subsequent_indent="    "))
        if len(failed) > 5:
            lines.append(f"  ! ... {len(failed) - 5} more in summary.json")
    elif ok is True:
        names = [str(n).replace("_", " ") for n in raw_checks if n]
        lines.extend(textwrap.wrap(f"validity: all {len(names)} checks passed ({', '.join(names)})", _WIDTH,
                                   subsequent_indent="  "))
    lim = detection_limit(data.summary, float(load_pipeline()["report"]["detection_limit_spreads"]))
    if lim is not None:
        lines.extend(_wrap(f"detection limit: faults warming a module by less than ~{lim[1]:.1f} K "
                           f"({lim[0]:.2f} K healthy scatter) may be missed (faint PID, light soiling)"))
    cov = raw_checks.get("coverage")
    if cov and cov.get("modules_without_data"):
        lines.append(f"modules without usable pixels: {int(cov['modules_without_data']):,}")
    dx, dy = data.layout_shift_m
    if abs(dx) + abs(dy) > 0:
        lines.append(f"layout shifted onto the ortho by {dx:+.2f} m E, {dy:+.2f} m N")
    art = data.summary.get("image_artefacts") or {}
    if isinstance(art, dict) and art.get("stretches"):
        ns = len(art["stretches"])
        lines.extend(_wrap(f"image artefacts levelled: {ns} row stretch{'es' if ns != 1 else ''}, "
                           f"{int(art.get('levelled_modules') or 0)} modules (mosaic seams, reflections; "
                           "see summary.json)"))
    lay = data.summary.get("layout") or {}
    for w in (lay.get("warnings") or []) if isinstance(lay, dict) else []:
        w = str(w)
        if lay.get("file") and w.startswith(f"{lay['file']}: "):
            w = w[len(lay["file"]) + 2:]
        lines.extend(textwrap.wrap(f"! layout: {w}", _WIDTH, subsequent_indent="  "))
    lines.extend(_file_lines(Path(data.result_dir)))
    lines.append("safety: arrays are live (DC) in daylight even when disconnected; hot spots burn and")
    lines.append("  faults can arc and start fires. Site work only by qualified persons under local")
    lines.append("  electrical codes; drone flights only under local aviation rules.")
    return lines


def print_inspection_summary(result_dir: str | os.PathLike[str], top: int | None = None) -> None:
    """Print the end-of-run summary of a result folder (fits one screen, ~30 lines).

    Counts per defect and severity, total power and energy loss, the top work orders,
    acquisition-validity warnings, where the files are, and short safety notes.
    """
    for line in summary_lines(result_dir, top):
        click.echo(line)
