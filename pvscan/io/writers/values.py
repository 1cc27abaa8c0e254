"""JSON-ready values, the ``[outputs]`` settings and the cell format shared by the writers."""
from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["to_jsonable", "LIST_SEP", "settings_of"]

#: Separator of list values in CSV cells and GeoPackage text fields.
LIST_SEP = ";"


def settings_of(settings: Mapping | None) -> Mapping:
    """The ``[outputs]`` section over the pipeline file's defaults (a pipeline, a mapping
    of sections, the section itself, or None)."""
    from pvscan.io.settings import section

    return section(settings, "outputs")

def to_jsonable(value: Any) -> Any:
    """Plain-JSON version of a value: NaN/NA -> None, numpy scalars -> Python, arrays -> lists."""
    if value is None:
        return None
    if isinstance(value, (str, bool)):
        return value
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, Mapping):
        return {str(k): to_jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray, pd.Series)):
        return [to_jsonable(v) for v in value]
    if isinstance(value, (set, frozenset)):
        return [to_jsonable(v) for v in sorted(value)]
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, (pd.Timestamp,)):
        return value.isoformat()
    if hasattr(value, "isoformat"):
        return value.isoformat()
    if hasattr(value, "__dataclass_fields__"):
        import dataclasses

        return to_jsonable(dataclasses.asdict(value))
    if hasattr(value, "to_dict"):
        return to_jsonable(value.to_dict())
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        pass
    return str(value)


def round_floats(obj: Any, nd: int = 4) -> Any:
    """Round floats of property values (not coordinates) to ``nd`` decimals (0.1 mK, 0.1 mW)."""
    if isinstance(obj, float):
        return round(obj, nd)
    if isinstance(obj, list):
        return [round_floats(v, nd) for v in obj]
    if isinstance(obj, dict):
        return {k: round_floats(v, nd) for k, v in obj.items()}
    return obj


def dumps(obj: Any, indent: int | None = None) -> str:
    if indent is None:
        return json.dumps(obj, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
    return json.dumps(obj, ensure_ascii=False, allow_nan=False, indent=indent) + "\n"


def column_values(frame: pd.DataFrame, col: str, nd: int = 4) -> list:
    """A column as JSON-ready Python values (floats rounded to ``nd`` decimals, NaN -> None)."""
    ser = frame[col]
    if pd.api.types.is_float_dtype(ser.dtype):
        vals = np.round(ser.to_numpy(dtype=float), nd)
        return [v if math.isfinite(v) else None for v in vals.tolist()]
    if pd.api.types.is_bool_dtype(ser.dtype) and ser.dtype != object:
        return [bool(v) for v in ser.tolist()]
    if pd.api.types.is_integer_dtype(ser.dtype):
        return [None if pd.isna(v) else int(v) for v in ser.astype(object).tolist()]
    # text and missing values (ids, classes) as they are: what to_jsonable and round_floats give them
    return [v if v is None or type(v) is str else round_floats(to_jsonable(v), nd) for v in ser.tolist()]


def csv_cell(v: Any) -> str:
    """Text of one CSV cell: empty for missing values, floats without a spurious exponent."""
    if v is None:
        return ""
    if isinstance(v, float):
        if not math.isfinite(v):
            return ""
        return repr(v) if v != int(v) or abs(v) >= 1e15 else f"{v:.1f}"
    return str(v)
