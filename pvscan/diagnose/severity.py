"""Severity of every anomaly: safety, repair or monitor.

Cautions: hot modules and junction boxes can burn; faults can arc and start fires; work on
live DC parts only by qualified persons following the local electrical codes.

References
----------
.. [1] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from pvscan.diagnose.results import SPOT_DEFECTS
from pvscan.io.settings import section

__all__ = ["assign_severity"]


def assign_severity(anomalies: pd.DataFrame, settings: Mapping[str, Any] | None = None) -> pd.DataFrame:
    """Set ``severity`` (safety | repair | monitor) and ``iec_class`` of each anomaly.

    * ``safety``: temperatures that threaten the encapsulant, backsheet, connectors or the
      junction box, or a fire: ``t_max_c >= safety_t_max_c`` for any pattern; a spot
      pattern with ``delta_t_norm_k >= safety_delta_t_norm_k``; a junction box with
      ``delta_t_norm_k >= safety_junction_box_delta_t_norm_k``;
    * ``monitor``: patterns in ``monitor_defects`` (soiling: cleaning, not repair), hot
      cells below ``repair_hot_cell_delta_t_norm_k``, and PID strings whose total STC power
      loss (``power_loss_w``, once :func:`pvscan.diagnose.loss.estimate_loss` has set it) is
      below ``repair_pid_power_loss_w`` or, before the loss is known, whose median
      ``delta_t_norm_k`` is below ``repair_pid_delta_t_norm_k`` (a string at about 0 K and
      0 W is not sent to repair);
    * ``repair``: everything else (lost output: open strings and modules, bypassed
      substrings, PID, hot cells, junction boxes).

    ``iec_class`` follows the classes of abnormality of IEC TS 62446-3 (from memory:
    CoA 1 no abnormality, CoA 2 thermal abnormality, CoA 3 safety-relevant thermal
    abnormality); anomalies are CoA 2 or CoA 3.

    Parameters
    ----------
    anomalies : DataFrame
        With ``defect``, ``delta_t_norm_k`` [K], ``t_max_c`` [degC] and, optionally,
        ``power_loss_w`` [W] (STC).
    settings : Pipeline or mapping, optional
        The ``[severity]`` section.

    Returns
    -------
    DataFrame
        A copy with ``severity`` and ``iec_class``.
    """
    cfg = section(settings, "severity")
    out = anomalies.copy()
    if out.empty:
        out["severity"] = pd.Series(dtype=object)
        out["iec_class"] = pd.Series(dtype=object)
        return out
    d = out["defect"].astype(str).to_numpy()
    dtn = pd.to_numeric(out["delta_t_norm_k"], errors="coerce").to_numpy(dtype=float)
    tmax = pd.to_numeric(out["t_max_c"], errors="coerce").to_numpy(dtype=float)
    spot = np.isin(d, list(SPOT_DEFECTS))
    hot = np.isin(d, ["hot_cell", "several_hot_cells"])
    with np.errstate(invalid="ignore"):
        safety = (tmax >= float(cfg["safety_t_max_c"])) | (spot & (dtn >= float(cfg["safety_delta_t_norm_k"]))) \
            | ((d == "junction_box") & (dtn >= float(cfg["safety_junction_box_delta_t_norm_k"])))
        if "power_loss_w" in out.columns:
            loss = pd.to_numeric(out["power_loss_w"], errors="coerce").to_numpy(dtype=float)
        else:
            loss = np.full(len(out), np.nan)
        # a PID string: by its loss when known, else by its normalised delta T (NaN: monitor)
        pid_repair = np.where(np.isfinite(loss), loss >= float(cfg["repair_pid_power_loss_w"]),
                              dtn >= float(cfg["repair_pid_delta_t_norm_k"]))
        below_repair = hot & (dtn < float(cfg["repair_hot_cell_delta_t_norm_k"]))
        monitor = np.isin(d, list(cfg["monitor_defects"])) | below_repair | ((d == "pid") & ~pid_repair)
    sev = np.where(safety, "safety", np.where(monitor, "monitor", "repair"))
    out["severity"] = sev.astype(object)
    out["iec_class"] = np.where(safety, str(cfg["iec_class_safety"]), str(cfg["iec_class_other"])).astype(object)
    return out
