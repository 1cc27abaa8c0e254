"""Work order: priority and recommended action of every anomaly.

Ordering rule (:func:`rank`):

1. severities listed in ``[rank] first_severities`` come first, in that order (by default
   only ``safety``: every safety item is placed before any other item);
2. then the larger yearly energy loss first (``energy_loss_kwh_per_year``, else
   ``power_loss_w``; missing values last);
3. then the higher confidence first;
4. ties keep a stable order by module id and defect, so the same input always gives the
   same order.

Recommended actions are plain words per defect class. Every action that involves work on
live DC parts says it is for qualified persons under the local electrical codes (common
practice; PV strings are live whenever light falls on the modules).
"""
from __future__ import annotations

import logging
import math
from collections.abc import Mapping

import numpy as np
import pandas as pd

__all__ = ["rank", "recommended_action", "assign_anomaly_ids", "ACTIONS", "LIVE_DC_NOTE"]

log = logging.getLogger(__name__)

#: Appended to every action that involves live DC work (common practice).
LIVE_DC_NOTE = ("Live DC work: only qualified persons, under the local electrical codes and the "
                "site's safety rules; the modules are live whenever light falls on them.")

#: Hot-surface caution for defects that run hot (common practice).
HOT_NOTE = "Surfaces may be hot: let them cool or wear protective gloves."

#: Plain-words action per defect class, and whether it is live DC work.
ACTIONS: dict[str, tuple[str, bool]] = {
    "hot_cell": (
        "Inspect the module front and back for cell cracks, broken glass, backsheet burns or "
        "shading objects; remove any local shading or dirt; replace the module if the cell is "
        "damaged or the hot spot persists.", True),
    "several_hot_cells": (
        "Inspect the module for cracked or broken cells and glass and for local shading or dirt; "
        "measure the module's IV curve and replace it if its output is reduced or the glass or "
        "backsheet is damaged.", True),
    "bypassed_substring": (
        "Check the substring's bypass diode and the cell interconnects (IV curve or diode test "
        "at the junction box); replace the module if a diode has failed short or a substring is "
        "interrupted.", True),
    "several_bypassed_substrings": (
        "Check the bypass diodes and the cell interconnects of the affected substrings (IV curve "
        "or diode test at the junction box); replace the module if diodes have failed or "
        "substrings are interrupted.", True),
    "open_module": (
        "Check the module's connectors, cables and junction box for an interruption; measure its "
        "open-circuit voltage; repair the connection or replace the module.", True),
    "open_string": (
        "Check the string fuse, the string's connectors and cabling and the input at the combiner "
        "box or inverter; measure the string's open-circuit voltage and current, then repair the "
        "interruption.", True),
    "pid": (
        "Measure the string's IV curves and check the modules for potential-induced degradation "
        "(the modules near the negative end are usually the worst); consider PID recovery "
        "equipment or grounding changes as advised by the module maker.", True),
    "soiling": (
        "Clean the modules (water and soft brushes, following the module maker's cleaning "
        "instructions; no abrasive tools); the array stays live while cleaning, so do not touch "
        "cables or connectors.", False),
    "junction_box": (
        "Check the junction box and its bypass diodes, connections and sealing for overheating or "
        "burn marks; replace the module if the box is damaged.", True),
}

_DEFAULT_ACTION = ("Inspect the module and its electrical connections on site and decide on repair "
                   "or replacement.", True)
_HOT_DEFECTS = {"hot_cell", "several_hot_cells", "junction_box"}


def _section(settings: Mapping | None, name: str) -> Mapping:
    if settings is None:
        return {}
    keys = list(iter(settings))
    return settings[name] if name in keys else settings


def recommended_action(defect: str | None, severity: str | None = None,
                       overrides: Mapping[str, str] | None = None) -> str:
    """Recommended action in plain words for one anomaly.

    Parameters
    ----------
    defect : str
        Defect class (CONTRACT.md vocabulary; unknown classes get a generic inspection).
    severity : {'safety', 'repair', 'monitor'}, optional
        ``safety`` prefixes an urgency note; ``monitor`` turns the action into a re-check.
    overrides : mapping, optional
        Replacement action texts per defect (``[rank] actions`` of the pipeline). The
        live-DC note is appended to them too when the defect is live DC work.

    Returns
    -------
    str
        The action text; live DC work always ends with :data:`LIVE_DC_NOTE`.
    """
    text, live = ACTIONS.get(str(defect), _DEFAULT_ACTION)
    if overrides and defect is not None and defect in overrides:
        text = str(overrides[defect])
    if severity == "safety":
        text = ("Urgent (safety): keep people away from the affected area until it is made safe. "
                + text)
    elif severity == "monitor":
        text = "Monitor: no immediate work needed; re-check on the next flight. If it has grown: " + text
    if defect in _HOT_DEFECTS:
        text = f"{text} {HOT_NOTE}"
    if live:
        text = f"{text} {LIVE_DC_NOTE}"
    return text


def assign_anomaly_ids(anomalies: pd.DataFrame) -> pd.DataFrame:
    """A copy with an ``anomaly_id`` for every row that has none.

    The id is ``<module_id>:<defect>`` (stable from flight to flight: the same defect on the
    same module gets the same id), with ``:2``, ``:3`` ... appended when a module has several
    anomalies of one class. Existing ids are kept.
    """
    out = anomalies.copy()
    if len(out) == 0:
        if "anomaly_id" not in out.columns:
            out["anomaly_id"] = pd.Series(dtype=object)
        return out
    existing = out["anomaly_id"].tolist() if "anomaly_id" in out.columns else [None] * len(out)
    used = {str(a) for a in existing if a is not None and not (isinstance(a, float) and math.isnan(a))}
    ids = []
    for a, (_, row) in zip(existing, out.iterrows()):
        if a is not None and not (isinstance(a, float) and math.isnan(a)):
            ids.append(str(a))
            continue
        base = f"{row.get('module_id', row.get('module_index'))}:{row.get('defect', 'anomaly')}"
        cand, k = base, 1
        while cand in used:
            k += 1
            cand = f"{base}:{k}"
        used.add(cand)
        ids.append(cand)
    out["anomaly_id"] = pd.Series(ids, index=out.index, dtype=object)
    return out


def _num(frame: pd.DataFrame, col: str) -> np.ndarray:
    if col not in frame.columns:
        return np.full(len(frame), np.nan)
    return pd.to_numeric(frame[col], errors="coerce").to_numpy(dtype=float)


def rank(anomalies: pd.DataFrame, settings: Mapping | None = None) -> pd.DataFrame:
    """Give every anomaly a priority (1 = first) and a recommended action.

    Parameters
    ----------
    anomalies : pandas.DataFrame
        Anomalies with ``severity``, ``defect``, ``confidence`` [0..1] and, after
        :func:`pvscan.diagnose.loss.estimate_loss`, ``energy_loss_kwh_per_year`` [kWh/yr] and
        ``power_loss_w`` [W].
    settings : mapping, optional
        The pipeline or its ``[rank]`` section: ``first_severities`` (list, default
        ``["safety"]``), ``actions`` (per-defect action texts overriding the built-in ones).

    Returns
    -------
    pandas.DataFrame
        A copy sorted by priority (index reset), with ``priority`` (int, 1..N), ``action``
        (str) and ``anomaly_id`` (assigned where missing).
    """
    sec = _section(settings, "rank")
    keys = list(iter(sec))
    first = list(sec["first_severities"]) if "first_severities" in keys else ["safety"]
    overrides = dict(sec["actions"]) if "actions" in keys else {}
    out = assign_anomaly_ids(anomalies).reset_index(drop=True)
    n = len(out)
    if n == 0:
        out["priority"] = pd.Series(dtype="int64")
        out["action"] = pd.Series(dtype=object)
        return out
    sev = out["severity"].tolist() if "severity" in out.columns else [None] * n
    tier = np.array([first.index(s) if s in first else len(first) for s in sev], dtype=float)
    energy = _num(out, "energy_loss_kwh_per_year")
    power = _num(out, "power_loss_w")
    value = np.where(np.isfinite(energy), energy, np.nan)
    if not np.isfinite(value).any():
        value = power
    conf = _num(out, "confidence")
    mid = out["module_id"].astype(str).tolist() if "module_id" in out.columns else [""] * n
    dfc = out["defect"].astype(str).tolist() if "defect" in out.columns else [""] * n
    # stable keys: tier asc, value desc (NaN last), confidence desc (NaN last), module id, defect
    order = sorted(range(n), key=lambda i: (
        tier[i],
        0 if np.isfinite(value[i]) else 1, -value[i] if np.isfinite(value[i]) else 0.0,
        0 if np.isfinite(conf[i]) else 1, -conf[i] if np.isfinite(conf[i]) else 0.0,
        mid[i], dfc[i], i))
    out = out.iloc[order].reset_index(drop=True)
    out["priority"] = np.arange(1, n + 1, dtype="int64")
    out["action"] = [recommended_action(d, s, overrides) for d, s in
                     zip(out["defect"] if "defect" in out.columns else [None] * n,
                         out["severity"] if "severity" in out.columns else [None] * n)]
    log.debug("ranked %d anomalies (%d in the first tiers)", n, int((tier < len(first)).sum()))
    return out
