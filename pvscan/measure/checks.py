"""What every validity check is made of: the check record, its settings, and finite values.

Shared by :mod:`pvscan.measure.validity` (acquisition limits and the measurement's checks) and
:mod:`pvscan.measure.evidence_checks` (the checks of what the classification measured).
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

#: One check of :class:`pvscan.measure.validity.Validity`: name, value, limit, kind, unit, passed,
#: source, message.
Check = dict[str, Any]

__all__ = ["Check", "make_check", "finite", "validity_settings"]


def validity_settings(settings: Mapping[str, Any] | None) -> Mapping[str, Any]:
    """The ``[validity]`` section of ``settings`` (defaults for keys left out)."""
    from pvscan.io.settings import section

    return section(settings, "validity")


def make_check(name: str, value: float | None, limit: float, kind: str, unit: str, source: str,
               message: str | None = None) -> Check:
    """One check: ``passed`` is None when ``value`` is unknown (None or not finite), else whether
    ``value`` keeps ``limit`` (``kind`` "min" or "max"); ``message`` defaults to a line naming both."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        passed = None
        value = None
    else:
        value = float(value)
        passed = bool(value >= limit) if kind == "min" else bool(value <= limit)
    if message is None:
        rel = ">=" if kind == "min" else "<="
        shown = "unknown" if value is None else f"{value:.4g} {unit}".rstrip()
        message = (f"{name.replace('_', ' ')}: {shown}, needs {rel} {float(limit):g} {unit}".rstrip()
                   + ("" if passed is not False else " (failed)"))
    return {"name": name, "value": value, "limit": float(limit), "kind": kind, "unit": unit,
            "passed": passed, "source": source, "message": message}


def finite(x: Any) -> float | None:
    """``x`` as a float, or None when missing or not finite."""
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None
