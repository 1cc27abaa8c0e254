"""Words and numbers of the report: formatting, the defect glossary, the safety cautions and
why each finding is a safety, repair or monitor item. Plain strings only (the templates
escape them)."""
from __future__ import annotations

import datetime as _dt
import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

from pvscan.io.writers.summary import SAFETY_CAUTIONS

__all__ = ["SAFETY_CAUTIONS", "DEFECT_TEXT", "fmt", "sig", "isnum", "defect_name", "first_sentence",
           "period", "cautions", "severity_reason", "label_of", "unit_of"]

#: Plain description of each defect pattern (our own wording).
DEFECT_TEXT = {
    "hot_cell": "one cell clearly warmer than the rest of the module (cell crack, shading, "
                "mismatch or local shunt)",
    "several_hot_cells": "several separate hot cells in one module",
    "bypassed_substring": "one bypass-diode substring uniformly warm: its current no longer flows "
                          "through the string (diode conducting)",
    "several_bypassed_substrings": "two or more substrings of one module uniformly warm",
    "open_module": "the whole module uniformly warm: it delivers no power to the string",
    "open_string": "a run of modules of one string uniformly warm: the string is not producing",
    "pid": "warm modules toward one end of a string and cells warm at the frame edge: a pattern of "
           "potential-induced degradation",
    "soiling": "a warm band or patch at the lower edge where dirt collects",
    "junction_box": "a hot spot at the junction box (connection, soldering or diode fault)",
}


def isnum(v: Any) -> bool:
    """True for a finite number (or a string holding one)."""
    try:
        return v is not None and not isinstance(v, bool) and math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def fmt(v: Any, digits: int = 1, unit: str = "", thousands: bool = False) -> str:
    """``v`` with ``digits`` decimals and its unit; an en dash when not a number."""
    if not isnum(v):
        return "–"
    f = float(v)
    txt = f"{f:,.{digits}f}" if thousands else f"{f:.{digits}f}"
    return f"{txt}{(' ' + unit) if unit else ''}"


def sig(v: Any, digits: int = 4) -> str:
    """A number with ``digits`` significant digits, without exponent for everyday magnitudes."""
    if not isnum(v):
        return "–" if v is None else str(v)
    f = float(v)
    if f != 0 and (abs(f) >= 1e6 or abs(f) < 1e-3):
        return f"{f:.{digits - 1}e}"
    return f"{f:.{digits}g}"


def defect_name(defect: Any) -> str:
    return str(defect or "unknown").replace("_", " ")


def first_sentence(text: Any, limit: int = 140) -> str:
    """The first sentence of an action text (the full text is on the card)."""
    if not isinstance(text, str) or not text.strip():
        return ""
    t = text.strip()
    cut = t.find(". ")
    first = t[: cut + 1] if 0 < cut < limit else t
    return first if len(first) <= limit else first[: limit - 1].rstrip() + "…"


def period(start: str, end: str) -> str:
    """'14 Jun 2026, 10:40–11:25 (UTC+02:00)' from ISO 8601 times (as given when unparsable)."""
    try:
        t0 = _dt.datetime.fromisoformat(start)
    except (TypeError, ValueError):
        return " – ".join(x for x in (start, end) if x)
    try:
        t1 = _dt.datetime.fromisoformat(end) if end else None
    except (TypeError, ValueError):
        t1 = None
    if t1 is not None and t0.tzinfo is not None and t1.tzinfo is not None:
        t1 = t1.astimezone(t0.tzinfo)
    off = t0.strftime("%z")
    zone = f" (UTC{off[:3]}:{off[3:]})" if off else ""
    day = f"{t0.day} {t0.strftime('%b %Y')}"
    if t1 is None:
        return f"{day}, {t0:%H:%M}{zone}"
    if t1.date() == t0.date():
        form = "%H:%M:%S" if t1.strftime("%H:%M") == t0.strftime("%H:%M") else "%H:%M"
        return f"{day}, {t0.strftime(form)}–{t1.strftime(form)}{zone}"
    return f"{day} {t0:%H:%M} – {t1.day} {t1.strftime('%b %Y')} {t1:%H:%M}{zone}"


def _words(text: str) -> set[str]:
    return {w for w in re.findall(r"[a-z]+", text.lower()) if len(w) > 3}


def cautions(extra: Sequence[Any] = ()) -> list[str]:
    """:data:`SAFETY_CAUTIONS` and the cautions of ``extra`` (summary.json ``safety``) that say
    something new: an extra item sharing at least 40 % of its words (Jaccard index of the words
    longer than three letters) with an item already listed is a near-duplicate and left out."""
    items = list(SAFETY_CAUTIONS)
    seen = [_words(s) for s in items]
    for s in extra:
        if not isinstance(s, str) or not s.strip():
            continue
        w = _words(s)
        if any(len(w & o) / max(len(w | o), 1) >= 0.4 for o in seen):
            continue
        items.append(s.strip())
        seen.append(w)
    return items


# ---------------------------------------------------------------------- severity
def severity_reason(row: Mapping[str, Any], rules: Mapping[str, Any] | None,
                    spot_defects: Sequence[str] = ("hot_cell", "several_hot_cells", "junction_box")) -> str:
    """Why a finding is safety, repair or monitor: the rule of the ``[severity]`` settings that
    put it there and the finding's value (``pvscan.diagnose.severity.assign_severity``).

    Parameters
    ----------
    row : mapping
        ``severity``, ``defect``, ``delta_t_norm_k`` [K], ``t_max_c`` [degC], ``power_loss_w`` [W].
    rules : mapping or None
        The ``[severity]`` section the run used (``safety_t_max_c``, ``safety_delta_t_norm_k``,
        ``safety_junction_box_delta_t_norm_k``, ``repair_hot_cell_delta_t_norm_k``,
        ``monitor_defects``); None when unknown.
    """
    sev = str(row.get("severity") or "")
    d = str(row.get("defect") or "")
    dtn: Any = row.get("delta_t_norm_k")
    tmax: Any = row.get("t_max_c")
    name = defect_name(d)
    r = dict(rules or {})

    def num(key: str) -> float | None:
        v: Any = r.get(key)
        return float(v) if isnum(v) else None

    t_lim, spot_lim = num("safety_t_max_c"), num("safety_delta_t_norm_k")
    jb_lim, hc_lim = num("safety_junction_box_delta_t_norm_k"), num("repair_hot_cell_delta_t_norm_k")
    pid_w, pid_k = num("repair_pid_power_loss_w"), num("repair_pid_delta_t_norm_k")
    loss: Any = row.get("power_loss_w")
    if d == "pid" and sev in ("repair", "monitor"):  # a PID string: by its loss, else its delta T
        above = sev == "repair"
        side = "at or above" if above else "below"
        then = "" if above else "; check again at the next flight"
        if pid_w is not None and isnum(loss):
            return (f"{sev.capitalize()}: the string loses {fmt(loss, 0, 'W', True)} at STC, {side} the "
                    f"{pid_w:g} W repair rule for PID strings{then}.")
        if pid_k is not None and isnum(dtn):
            return (f"{sev.capitalize()}: normalised ΔT {fmt(dtn, 2, 'K')}, {side} the {pid_k:g} K repair rule "
                    f"for PID strings{then}.")
    hot = d in ("hot_cell", "several_hot_cells")
    if sev == "safety":
        if t_lim is not None and isnum(tmax) and float(tmax) >= t_lim:
            return (f"Safety: hottest point {fmt(tmax, 1, '°C')}, at or above the {t_lim:g} °C safety rule "
                    "(insulation, connectors and junction boxes are at risk at that temperature).")
        if d == "junction_box" and jb_lim is not None and isnum(dtn) and float(dtn) >= jb_lim:
            return (f"Safety: normalised ΔT {fmt(dtn, 1, 'K')}, above the {jb_lim:g} K safety rule for "
                    "junction boxes (a failing connection or diode is a fire risk).")
        if d in spot_defects and spot_lim is not None and isnum(dtn) and float(dtn) >= spot_lim:
            return (f"Safety: normalised ΔT {fmt(dtn, 1, 'K')}, above the {spot_lim:g} K safety rule for "
                    "hot spots (risk of backsheet burn-through).")
        return "Safety: as recorded in the result (the rule that set it is not in this pipeline's settings)."
    if sev == "monitor":
        if d in [str(x) for x in (r.get("monitor_defects") or [])]:
            return f"Monitor: {name} calls for cleaning or watching, not repair."
        if hot and hc_lim is not None and isnum(dtn) and float(dtn) < hc_lim:
            return (f"Monitor: normalised ΔT {fmt(dtn, 1, 'K')}, below the {hc_lim:g} K repair rule for "
                    "hot cells; check again at the next flight.")
        return "Monitor: as recorded in the result."
    if sev == "repair":
        if hot and hc_lim is not None and isnum(dtn):
            top = f", below the {spot_lim:g} K safety rule" if spot_lim is not None else ""
            return (f"Repair: normalised ΔT {fmt(dtn, 1, 'K')}, at or above the {hc_lim:g} K repair rule "
                    f"for hot cells{top}.")
        lost = f" ({fmt(loss, 0, 'W', True)} at STC)" if isnum(loss) else ""
        return f"Repair: {name} loses power{lost}; below every safety rule."
    return ""


# ---------------------------------------------------------------------- condition labels
_UNITS = (("poa_global_change", "%"), ("poa_global", "W/m²"), ("irradiance_change", "%"), ("irradiance", "W/m²"),
          ("temp_", "°C"), ("_c", "°C"), ("wind", "m/s"), ("relative_humidity", "%"), ("_pct", "%"),
          ("duration_s", "s"), ("cloud_okta", "okta"), ("altitude_m", "m"))
_LABELS = {"poa_global": "plane-of-array irradiance (mean)", "temp_air": "air temperature (mean)",
           "wind_speed": "wind speed (mean)", "temp_sky": "sky temperature",
           "relative_humidity": "relative humidity", "poa_global_change_pct": "irradiance change during flight",
           "poa_global_w_m2": "plane-of-array irradiance (mean)", "temp_air_c": "air temperature (mean)",
           "wind_speed_m_s": "wind speed (mean)", "wind_speed_max_m_s": "wind speed (highest)",
           "temp_sky_c": "sky temperature", "relative_humidity_pct": "relative humidity",
           "poa_global_min_w_m2": "irradiance (lowest)", "poa_global_max_w_m2": "irradiance (highest)",
           "poa_global_std_w_m2": "irradiance (standard deviation)", "duration_s": "flight duration",
           "cloud_okta": "cloud cover", "n_samples": "weather samples", "source": "conditions from",
           "sky_source": "sky temperature from"}


def unit_of(key: str) -> str:
    """The unit of a summary.json condition key (from its name)."""
    k = key.split(".")[-1]
    if k.endswith("_pct"):
        return "%"
    if k.endswith("_w_m2") or (k.startswith("poa_global") and k.endswith(("_std", "_min", "_max"))):
        return "W/m²"
    for frag, unit in _UNITS:
        if frag in k:
            return unit
    return ""


def label_of(key: str) -> str:
    """A plain label of a summary.json condition key."""
    k = key.split(".")[-1]
    if k in _LABELS:
        return _LABELS[k]
    label = key
    for suffix in ("_pct", "_s", "_c", "_m", "_w_m2", "_k"):
        if label.endswith(suffix):
            label = label[: -len(suffix)]
            break
    return label.replace("_", " ").replace(".", " · ")
