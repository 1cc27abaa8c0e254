"""Values read back from result records (``summary.json``, GeoJSON properties, CSV cells).

The report, the site history and the CLI summary read the same result files; these helpers
are the one way they look up a nested key and turn a recorded value into a number.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any, SupportsFloat

__all__ = ["get_path", "as_float"]


def get_path(obj: Any, *paths: str, default: Any = None, skip_empty: bool = False) -> Any:
    """First value found at one of the dotted ``paths`` in nested mappings, else ``default``.

    Parameters
    ----------
    obj : mapping
        E.g. the ``summary.json`` document.
    *paths : str
        Dotted key paths tried in order (``"flight.id"``, ``"flight_id"``): newer and older
        spellings of one record.
    default : object
        Returned when no path holds a value.
    skip_empty : bool
        Also pass over empty text (``""``) as if the key were missing.
    """
    for path in paths:
        cur = obj
        ok = True
        for key in path.split("."):
            if isinstance(cur, Mapping) and key in cur:
                cur = cur[key]
            else:
                ok = False
                break
        if ok and cur is not None and not (skip_empty and cur == ""):
            return cur
    return default


def as_float(value: SupportsFloat | str | None) -> float:
    """A recorded value as a float; NaN for None and for anything that is not a number."""
    if value is None:
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan
