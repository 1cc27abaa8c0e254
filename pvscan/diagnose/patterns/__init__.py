"""Defect pattern tests, one module per family, each vectorised over modules.

=====================  ====================================================
module                 patterns
=====================  ====================================================
``open_circuit``       ``open_module``, ``open_string``
``substrings``         ``bypassed_substring``, ``several_bypassed_substrings``
``hot_spots``          ``hot_cell``, ``several_hot_cells``
``junction_box``       ``junction_box``
``soiling``            ``soiling``
``pid``                ``pid``
=====================  ====================================================

Every test takes a :class:`pvscan.diagnose.features.Features` record and the ``[classify]``
settings and returns a :class:`pvscan.diagnose.features.Hits` record (module patterns) or
the module runs it found (string patterns).
"""
from pvscan.diagnose.patterns.hot_spots import pattern_hot_cell
from pvscan.diagnose.patterns.junction_box import pattern_junction_box
from pvscan.diagnose.patterns.open_circuit import (
    open_module_floor,
    pattern_open_module,
    pattern_open_string,
    walk_along_row,
)
from pvscan.diagnose.patterns.pid import pattern_pid, pid_ring_contrast
from pvscan.diagnose.patterns.soiling import pattern_soiling
from pvscan.diagnose.patterns.substrings import pattern_bypassed_substring

__all__ = ["pattern_open_module", "open_module_floor", "pattern_open_string", "pattern_bypassed_substring",
           "pattern_hot_cell", "pattern_junction_box", "pattern_soiling", "pattern_pid", "pid_ring_contrast",
           "walk_along_row"]
