"""What the diagnose stages return: the defect vocabulary and the classification record.

The anomalies stay a DataFrame (one row per anomaly, the columns of
:data:`ANOMALY_COLUMNS`; loss and rank add theirs), since every writer downstream takes
tables; :class:`Diagnosis` bundles it with the per-module table.
"""
from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

__all__ = ["ANOMALY_COLUMNS", "MODULE_COLUMNS", "DEFECTS", "SPOT_DEFECTS", "STRING_DEFECTS", "Diagnosis"]

#: Columns of the anomalies DataFrame of :func:`pvscan.diagnose.classify.classify`, in order
#: (see DEVELOPERS.md).
ANOMALY_COLUMNS = [
    "module_index", "module_id", "module_indices", "module_ids", "defect", "other_defects",
    "region", "region_uv", "delta_t_k", "delta_t_norm_k", "t_max_c", "confidence",
    "severity", "iec_class",
]

#: Columns of the per-module table, aligned with the modules.
MODULE_COLUMNS = ["reference_c", "delta_t_k", "delta_t_norm_k", "defect", "classified", "confidence"]

#: The defect vocabulary.
DEFECTS = ("hot_cell", "several_hot_cells", "bypassed_substring", "several_bypassed_substrings",
           "open_module", "open_string", "pid", "soiling", "junction_box")

#: Patterns whose region temperature is its 95th percentile (the others: the median).
SPOT_DEFECTS = frozenset({"hot_cell", "several_hot_cells", "junction_box"})

#: Patterns reported as one anomaly over the modules of a string (or table row).
STRING_DEFECTS = frozenset({"open_string", "pid"})


@dataclass(frozen=True)
class Diagnosis:
    """Outcome of :func:`pvscan.diagnose.classify.classify`.

    Unpacks as ``anomalies, modules = classify(...)``.

    Attributes
    ----------
    anomalies : DataFrame
        One row per anomaly, columns :data:`ANOMALY_COLUMNS`: ``module_index`` (row of the
        modules frame), ``module_id``, ``module_indices`` / ``module_ids`` (all modules of
        the anomaly, several for string patterns), ``defect``, ``other_defects``, ``region``,
        ``region_uv`` (list of ``(u0, u1, v0, v1)`` boxes), ``delta_t_k`` [K],
        ``delta_t_norm_k`` [K], ``t_max_c`` [degC], ``confidence`` (0..1), ``severity``,
        ``iec_class``.
    modules : DataFrame
        Aligned with the modules, columns :data:`MODULE_COLUMNS`: ``reference_c`` [degC],
        ``delta_t_k``, ``delta_t_norm_k`` [K], ``defect`` (None when healthy),
        ``classified`` (False when too little of the module was imaged), ``confidence``.
    evidence : dict
        What the classification measured about the flight as a whole (module spread,
        out-of-string spread, open-module rise, strings or rows; see
        ``classify._evidence``), read by the validity checks.
    """

    anomalies: pd.DataFrame
    modules: pd.DataFrame
    evidence: dict[str, Any] = field(default_factory=dict)

    def __iter__(self) -> Iterator[pd.DataFrame]:
        return iter((self.anomalies, self.modules))
