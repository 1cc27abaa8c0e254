"""The report's content as plain data for the templates: one function per section, each
returning dicts, lists and strings (no markup; the templates escape everything)."""
from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import pandas as pd

from pvscan.report._geometry import as_list
from pvscan.report._result import SEVERITIES, ResultData, get_path
from pvscan.report._text import (
    DEFECT_TEXT,
    defect_name,
    first_sentence,
    fmt,
    isnum,
    label_of,
    severity_reason,
    sig,
    unit_of,
)

log = logging.getLogger(__name__)

__all__ = ["header", "validity", "registration", "counts", "worklist", "cards", "sheets", "conditions",
           "inputs", "artefacts", "method", "severity_rules"]


def _text(v: Any) -> str:
    """A cell value as text; empty for None / NaN / 'nan'."""
    if v is None or (isinstance(v, float) and v != v):
        return ""
    s = str(v).strip()
    return "" if s.lower() in ("nan", "none") else s


def _int(v: Any) -> int | None:
    return int(float(v)) if isnum(v) else None


# ---------------------------------------------------------------------- header and validity
def header(data: ResultData, totals: Mapping[str, float], ok: bool | None, n_failed: int) -> dict[str, Any]:
    an = data.anomalies
    sev = an["severity"].value_counts() if len(an) else pd.Series(dtype=int)
    cost = (f" (~{totals['yearly_cost']:,.0f} {totals['currency']}/yr)"
            if isnum(totals["yearly_cost"]) and totals["currency"] else "")
    items = [("modules inspected", f"{int(totals['n_modules']):,}", "", ""),
             ("findings", f"{int(totals['n_anomalies']):,}", "", ""),
             ("safety findings", f"{int(sev.get('safety', 0))}", "", "safety"),
             ("power loss at STC", fmt(totals["power_loss_w"] / 1000.0, 2), "kW", ""),
             ("energy loss" + cost, fmt(totals["energy_loss_kwh_per_year"] / 1000.0, 2), "MWh/yr", "")]
    verdict = {True: ("ok", "all checks passed"),
               False: ("fail", f"{n_failed} check{'s' if n_failed != 1 else ''} failed" if n_failed
                       else "not valid"),
               None: ("unknown", "not recorded")}[ok]
    share = totals["plant_share"]
    return {"site": data.site_name, "flight_id": data.flight_id or "–",
            "period": data_period(data) or "time not recorded",
            "power_loss": fmt(totals["power_loss_w"], 0, "W", True),
            "share": f" ({share * 100:.2f} % of plant)" if isnum(share) else "",
            "figures": [{"k": k, "v": v, "unit": u, "cls": c} for k, v, u, c in items],
            "verdict": {"cls": verdict[0], "text": verdict[1]}}


def data_period(data: ResultData) -> str:
    from pvscan.report._text import period

    return period(data.flight_start, data.flight_end)


def validity(summary: Mapping[str, Any], checks: list[dict], ok: bool | None,
             limit: tuple[float, float] | None = None) -> dict[str, Any]:
    """Every check of ``summary.json`` ``validity.checks`` as rows (whatever its name), the failed
    ones first in the banner; ``limit`` (healthy scatter, detection limit [K], see
    :func:`pvscan.report._result.detection_limit`) as a sentence."""
    rows = []
    for c in checks:
        lim: Any = c["limit"]
        prefix = "≥ " if c["kind"] == "min" else "≤ " if c["kind"] == "max" else ""
        rows.append({"name": str(c["name"]).replace("_", " "), "value": sig(c["value"]),
                     "limit": (prefix + sig(lim)) if lim is not None else "–", "unit": c["unit"],
                     "result": {True: "pass", False: "fail", None: "n/a"}[c["passed"]],
                     "cls": {True: "ok", False: "fail", None: "unknown"}[c["passed"]],
                     "source": c["source"], "message": c["note"]})
    failed = [r for r in rows if r["result"] == "fail"]
    rec = get_path(summary, "validity", default={})
    cf: Any = rec.get("confidence_factor") if isinstance(rec, Mapping) else None
    note = rec.get("note") if isinstance(rec, Mapping) and isinstance(rec.get("note"), str) else ""
    return {"ok": ok, "rows": rows, "failed": failed, "banner": ok is False,
            "confidence_factor": fmt(cf, 2) if isnum(cf) and float(cf) < 1.0 else "", "note": note,
            "limit": "" if limit is None else detection_sentence(*limit)}


def detection_sentence(spread_k: float, limit_k: float) -> str:
    """What a crew cannot expect this flight to show, from the healthy modules' scatter [K]."""
    return (f"Detection limit: healthy modules scatter {spread_k:.2f} K module against module, so a fault "
            f"that warms a module by less than about {limit_k:.1f} K (a faint PID string, light soiling, an "
            f"open module at low irradiance) cannot be told from that scatter and may be missing from this "
            f"result; a clean result is no proof that such faults are absent.")


_REG_SKIP = {"blocks", "notes", "message", "tables", "affine", "evidence"}


def registration(summary: Mapping[str, Any], shift: tuple[float, float]) -> dict[str, Any] | None:
    """The registration record of ``summary.json`` as labelled rows (None when absent)."""
    reg = summary.get("registration")
    if not isinstance(reg, Mapping) or not reg:
        return None
    rows: list[tuple[str, str]] = [("shift applied", f"{shift[0]:+.2f} m east, {shift[1]:+.2f} m north")]
    used = {"layout_shift_m", "shift_m", "placement"}
    place = reg.get("placement")
    if isinstance(place, Mapping):  # the fitted placement: rotation and scale about a centre
        if isnum(place.get("rotation_deg")):
            rows.append(("rotation applied", fmt(place["rotation_deg"], 3, "°")))
        if isnum(place.get("scale")):
            rows.append(("scale applied", f"{(float(place['scale']) - 1.0) * 100:+.3f} %"))
    ms = reg.get("measured_shift_m")
    if isinstance(ms, (list, tuple)) and len(ms) == 2 and all(isnum(v) for v in ms):
        rows.append(("shift measured", f"{float(ms[0]):+.2f} m east, {float(ms[1]):+.2f} m north"))
    used.add("measured_shift_m")
    for key, label, unit, digits in (("rotation_deg", "rotation applied", "°", 3),
                                     ("residual_rotation_deg", "rotation measured, not applied", "°", 3)):
        if isnum(reg.get(key)):
            rows.append((label, fmt(reg[key], digits, unit)))
        used.add(key)
    for key, label in (("scale", "scale applied"), ("residual_scale", "scale measured, not applied")):
        if isnum(reg.get(key)):
            rows.append((label, f"{(float(reg[key]) - 1.0) * 100:+.3f} %"))
        used.add(key)
    res = reg.get("residuals_m", reg.get("residual_m"))
    if isinstance(res, Mapping):
        rows.append(("residuals after the fit", ", ".join(f"{k} {fmt(v, 3, 'm')}" for k, v in res.items()
                                                          if isnum(v))))
    elif isnum(res):
        rows.append(("residual after the fit", fmt(res, 3, "m")))
    used.update({"residuals_m", "residual_m"})
    refined = reg.get("tables_refined", reg.get("n_tables_refined"))
    if refined is None and isinstance(reg.get("tables"), (list, Mapping)):
        refined = len(reg["tables"])
    if isinstance(refined, (list, tuple)):
        refined = len(refined)
    if isnum(refined):
        rows.append(("tables refined", f"{int(float(refined)):,}"))
    used.update({"tables_refined", "n_tables_refined"})
    if isnum(reg.get("confidence")):
        rows.append(("confidence of the fit", fmt(reg["confidence"], 2)))
    used.add("confidence")
    if isinstance(reg.get("applied"), bool):
        rows.append(("correction applied", "yes" if reg["applied"] else "no"))
    used.add("applied")
    for k, v in reg.items():  # anything else the registration recorded, as it is
        if k in used or k in _REG_SKIP:
            continue
        if isinstance(v, bool):
            rows.append((k.replace("_", " "), "yes" if v else "no"))
        elif isinstance(v, (int, float)) and isnum(v):
            rows.append((label_of(k), sig(v)))
        elif isinstance(v, str) and v:
            rows.append((k.replace("_", " "), v))
    ev = reg.get("evidence")
    if isinstance(ev, Mapping):
        rows += [(f"evidence: {k.replace('_', ' ')}", sig(v) if isnum(v) else str(v)) for k, v in ev.items()
                 if isinstance(v, (str, int, float, bool))]
    notes = [str(n) for n in (reg.get("notes") or []) if isinstance(n, str)]
    return {"rows": [{"k": k, "v": v} for k, v in rows], "message": _text(reg.get("message")), "notes": notes}


# ---------------------------------------------------------------------- findings and work
def counts(data: ResultData) -> dict[str, Any]:
    tab = data.counts()
    loss = data.loss_by_defect()
    rows = []
    for defect, r in tab.iterrows():
        lr = loss.loc[defect] if defect in loss.index else None
        rows.append({"defect": defect_name(defect), "n": [int(r[s]) or "" for s in SEVERITIES],
                     "total": int(r["total"]),
                     "power": fmt(lr["power_loss_w"] if lr is not None else None, 0, "", True),
                     "energy": fmt(lr["energy_loss_kwh_per_year"] if lr is not None else None, 0, "", True)})
    total = None
    if not tab.empty:
        tot = tab[list(SEVERITIES)].sum()
        total = {"n": [int(tot[s]) for s in SEVERITIES], "total": int(tab["total"].sum()),
                 "power": fmt(loss["power_loss_w"].sum(), 0, "", True),
                 "energy": fmt(loss["energy_loss_kwh_per_year"].sum(), 0, "", True)}
    glossary = [{"defect": defect_name(k), "text": v} for k, v in DEFECT_TEXT.items() if tab.empty or k in tab.index]
    return {"rows": rows, "total": total, "glossary": glossary, "severities": list(SEVERITIES)}


def _geo_link(r: pd.Series) -> str:
    """``geo:`` URI of the work order's position (RFC 5870), '' when unknown."""
    if isnum(r.get("lat")) and isnum(r.get("lon")):
        return f"geo:{float(r['lat']):.7f},{float(r['lon']):.7f}"
    return ""


def _walk_sorted(an: pd.DataFrame) -> tuple[list[tuple[int, pd.Series]], bool]:
    """(index, row) in walking order when every row has a ``walk_order``, else priority order."""
    items = list(an.iterrows())
    if "walk_order" in an and len(an) and pd.to_numeric(an["walk_order"], errors="coerce").notna().all():
        return sorted(items, key=lambda kr: (float(kr[1]["walk_order"]), kr[0])), True
    return items, False


def _prio(k: int, r: pd.Series) -> int:
    return int(r["priority"]) if isnum(r["priority"]) else k + 1


def _electrical(r: pd.Series) -> list[tuple[str, str]]:
    out = []
    for col, label in (("string_id", "string"), ("combiner_id", "combiner box"), ("inverter_id", "inverter")):
        v = _text(r.get(col))
        if v:
            out.append((label, v))
    return out


def worklist(data: ResultData) -> dict[str, Any]:
    items, walk = _walk_sorted(data.anomalies)
    rows = []
    for k, r in items:
        rows.append({"anchor": f"a{k + 1}", "prio": _prio(k, r), "walk": _int(r.get("walk_order")),
                     "severity": str(r["severity"]), "module": _text(r["module_id"]),
                     "table": _text(r.get("table_id")), "string": _text(r.get("string_id")),
                     "defect": defect_name(r["defect"]), "dtn": fmt(r["delta_t_norm_k"], 1),
                     "loss": fmt(r["power_loss_w"], 0, "", True), "action": first_sentence(r.get("action")),
                     "geo": _geo_link(r)})
    return {"rows": rows, "walk": walk, "has_string": any(r["string"] for r in rows)}


def card(k: int, r: pd.Series, shots: Mapping[str, Any], rules: Mapping[str, Any] | None) -> dict[str, Any]:
    pos = []
    if _text(r.get("table_id")):
        pos.append(f"table {_text(r['table_id'])}")
    if isnum(r.get("table_row")):
        pos.append(f"row {int(float(r['table_row']))}")
    if isnum(r.get("table_col")):
        pos.append(f"position {int(float(r['table_col']))}")
    ids = as_list(r.get("module_ids"))
    lonlat = (f"{float(r['lat']):.6f}, {float(r['lon']):.6f}" if isnum(r.get("lat")) and isnum(r.get("lon"))
              else "–")
    facts = [("ΔT", fmt(r["delta_t_k"], 1, "K")), ("ΔT normalised", fmt(r["delta_t_norm_k"], 1, "K")),
             ("hottest point", fmt(r["t_max_c"], 1, "°C")), ("confidence", fmt(r["confidence"], 2)),
             ("power loss", fmt(r["power_loss_w"], 0, "W", True)),
             ("energy loss", fmt(r["energy_loss_kwh_per_year"], 0, "kWh/yr", True))]
    if _text(r.get("iec_class")):
        facts.append(("class (IEC TS 62446-3)", _text(r["iec_class"])))
    others = as_list(r.get("other_defects"))
    if others:
        facts.append(("also", ", ".join(defect_name(o) for o in others)))
    action = r.get("action")
    return {"anchor": f"a{k + 1}", "prio": _prio(k, r), "severity": str(r["severity"]),
            "anomaly_id": str(r["anomaly_id"]), "defect": defect_name(r["defect"]),
            "module": _text(r["module_id"]), "span": f" + {len(ids) - 1} more modules" if len(ids) > 1 else "",
            "where": ", ".join(pos) or "position not recorded", "lonlat": lonlat, "geo": _geo_link(r),
            "walk": _int(r.get("walk_order")), "electrical": [{"k": a, "v": b} for a, b in _electrical(r)],
            "facts": [{"k": a, "v": b} for a, b in facts], "why": severity_reason(r, rules),
            "action": action if isinstance(action, str) else "", "shots": shots}


def cards(data: ResultData, shots: Sequence[Mapping[str, Any]], rules: Mapping[str, Any] | None) -> list[dict]:
    return [card(k, r, shots[k], rules) for k, r in data.anomalies.iterrows()]


def sheets(data: ResultData, rules: Mapping[str, Any] | None) -> list[dict[str, Any]]:
    """One field sheet per table (printed one per page): its findings in walking order."""
    items, _ = _walk_sorted(data.anomalies)
    groups: dict[str, list[dict[str, Any]]] = {}
    for k, r in items:
        table = _text(r.get("table_id")) or "no table"
        loc = [f"row {int(float(r['table_row']))}" if isnum(r.get("table_row")) else "",
               f"pos. {int(float(r['table_col']))}" if isnum(r.get("table_col")) else ""]
        groups.setdefault(table, []).append({
            "prio": _prio(k, r), "walk": _int(r.get("walk_order")), "severity": str(r["severity"]),
            "module": _text(r["module_id"]), "where": " ".join(x for x in loc if x),
            "string": _text(r.get("string_id")), "defect": defect_name(r["defect"]),
            "why": severity_reason(r, rules), "action": first_sentence(r.get("action"), 200)})
    return [{"table": t, "rows": rows, "id": f"sheet-{i + 1}"} for i, (t, rows) in enumerate(groups.items())]


# ---------------------------------------------------------------------- conditions, inputs, method
def conditions(data: ResultData) -> list[dict[str, str]]:
    rows: list[dict[str, str]] = []

    def walk(prefix: str, obj: Any, depth: int = 0) -> None:
        if isinstance(obj, Mapping) and depth < 2:
            for k, v in obj.items():
                if k != "validity":
                    walk(f"{prefix}.{k}" if prefix else str(k), v, depth + 1)
        elif isinstance(obj, (str, int, float, bool)) or obj is None:
            unit = unit_of(prefix)
            if isinstance(obj, float):
                val = fmt(obj, 1 if abs(obj) >= 10 else 2, unit)
            else:
                val = "–" if obj is None else (f"{obj} {unit}".strip() if isinstance(obj, int) else str(obj))
            rows.append({"k": label_of(prefix), "v": val})
        elif isinstance(obj, list) and len(obj) <= 6:
            rows.append({"k": prefix.replace("_", " "), "v": ", ".join(map(str, obj))})

    walk("", data.summary.get("conditions") or {})
    return rows


def inputs(data: ResultData) -> list[dict[str, str]]:
    inp = data.summary.get("inputs") or {}
    rows = []

    def add(label: str, value: Any) -> None:
        if value is None or value == "" or value == []:
            return
        if isinstance(value, (list, tuple)):
            value = ", ".join(Path(str(v)).name for v in value)
        rows.append({"k": label, "v": str(value)})

    add("flight manifest", Path(str(inp["manifest"])).name if inp.get("manifest") else None)
    add("thermal ortho", data.ortho_paths() or inp.get("files"))
    add("layout", Path(str(inp["layout"])).name if inp.get("layout") else None)
    lay = data.summary.get("layout") or {}
    if isinstance(lay, Mapping) and lay.get("skipped_patterns"):
        add("patterns not looked for", f"{', '.join(map(str, lay['skipped_patterns']))} (they need string ids; "
                                       "the layout was detected in the ortho)")
    add("map CRS", inp.get("crs"))
    if isnum(inp.get("gsd_m")):
        add("ground sampling distance", f"{float(inp['gsd_m']) * 100:.1f} cm/px")
    missing = inp.get("modules_without_data")
    if isinstance(missing, list) and missing:
        add("modules outside the ortho", f"{len(missing)} ({', '.join(map(str, missing[:5]))}"
                                         f"{' ...' if len(missing) > 5 else ''})")
    add("pipeline", Path(str(data.summary["pipeline"])).name if data.summary.get("pipeline") else "default")
    add("pvscan version", data.summary.get("pvscan_version"))
    return rows


def artefacts(data: ResultData) -> dict[str, Any] | None:
    """The row stretches levelled as image artefacts (mosaic seams, reflections)."""
    art = data.summary.get("image_artefacts") or {}
    if not isinstance(art, Mapping) or not art.get("levelling"):
        return None
    items = []
    stretches = art.get("stretches") or []
    for s in stretches[:12]:
        mods = s.get("modules") or []
        span = f"{mods[0]} to {mods[-1]}" if len(mods) > 1 else (mods[0] if mods else "?")
        why = {"strings": "crosses a string boundary", "rows": "repeats in the table's other row",
               "cold": "colder than its own string on both sides (a string's faults only warm it)",
               "edge": "runs to the table's end, where every row of the table steps at the same column"}.get(
            s.get("reason"), "")
        items.append(f"{span} ({len(mods)} modules): {sig(s.get('offset_k'))} K, {why}")
    return {"n": int(art.get("levelled_modules") or 0), "items": items,
            "more": len(stretches) - 12 if len(stretches) > 12 else 0}


def severity_rules(summary: Mapping[str, Any]) -> dict[str, Any] | None:
    """The ``[severity]`` rules the run used: as ``summary.json`` records them (``settings``),
    else (a result written before the settings were recorded) the pipeline file it names when
    it still exists, else the default pipeline's."""
    from pvscan.errors import PvscanError
    from pvscan.io.settings import load_pipeline

    recorded = summary.get("settings")
    rec = recorded.get("severity") if isinstance(recorded, Mapping) else None
    if isinstance(rec, Mapping) and rec:
        return dict(rec)
    path = summary.get("pipeline")
    try:
        pipe = load_pipeline(path if isinstance(path, str) and Path(path).is_file() else None)
        return dict(pipe["severity"])
    except (PvscanError, KeyError, OSError) as exc:
        log.info("severity rules not readable: %s", exc)
        return None


def method(summary: Mapping[str, Any], rules: Mapping[str, Any] | None) -> dict[str, Any]:
    """Model parameters the run used, as recorded in ``summary.json`` (``normalisation``)."""
    norm = summary.get("normalisation") if isinstance(summary.get("normalisation"), Mapping) else {}
    assert isinstance(norm, Mapping)

    def val(key: str, digits: int) -> str:
        return sig(norm[key], digits) if isnum(norm.get(key)) else ""

    r = dict(rules or {})
    return {"u0": val("u0", 4), "u1": val("u1", 4), "g_ref": val("g_ref_w_m2", 5) or "1000",
            "wind_ref": val("wind_ref_m_s", 3) or "1", "recorded": isnum(norm.get("u0")) and isnum(norm.get("u1")),
            "rules": [{"k": k.replace("_", " "), "v": ", ".join(map(str, v)) if isinstance(v, list) else sig(v)}
                      for k, v in r.items() if isinstance(v, (int, float, str, list))]}
