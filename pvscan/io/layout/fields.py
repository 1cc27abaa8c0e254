"""Layout field names as GIS software writes them, and field values read as ids and whole numbers."""
from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pvscan.errors import LayoutError

__all__ = ["FIELD_NAMES", "layout_fields"]

def _prop(row: pd.Series, *names: str, default: Any = None) -> Any:
    for n in names:
        if n in row.index:
            val = row[n]
            if val is None:
                continue
            if isinstance(val, float) and math.isnan(val):
                continue
            try:
                if pd.isna(val):
                    continue
            except (TypeError, ValueError):
                pass
            return val
    return default


def _feature_name(row: pd.Series, k: int) -> str:
    for key in ("module_id", "table_id", "id", "name"):
        v = _prop(row, key)
        if v is not None:
            return f"{key} {v}"
    return f"feature #{k + 1}"


#: Field names read for each layout property, in order of preference. Names compare
#: case-insensitively, with spaces and hyphens read as underscores; each name is also read
#: cut to the 10 characters a Shapefile keeps (``string_index`` -> ``string_ind``).
FIELD_NAMES = {
    "module_id": ("module_id", "moduleid", "module", "mod_id", "module_no", "module_nr", "module_name"),
    "table_id": ("table_id", "tableid", "table", "tbl_id", "table_no", "table_nr", "table_name"),
    "string_id": ("string_id", "stringid", "string", "str_id", "string_no", "string_nr", "string_name"),
    "string_index": ("string_index", "string_idx", "stringindex", "stringidx", "str_index", "str_idx",
                     "str_ind", "string_pos", "string_position", "str_pos", "pos_in_string",
                     "position_in_string", "string_order", "string_seq"),
    "combiner_id": ("combiner_id", "combinerid", "combiner", "combiner_box", "combinerbox", "combiner_box_id",
                    "cb_id", "cbid", "cb", "cb_no", "cb_nr", "cb_name", "combiner_no", "combiner_nr",
                    "combiner_name", "scb", "scb_id"),
    "inverter_id": ("inverter_id", "inverterid", "inverter", "inv_id", "invid", "inv", "inv_no", "inv_nr",
                    "inv_name", "inverter_no", "inverter_nr", "inverter_name"),
    "table_row": ("table_row", "tablerow", "tbl_row", "row", "row_no"),
    "table_col": ("table_col", "tablecol", "tbl_col", "col", "column", "col_no", "table_column", "position"),
    "rows": ("rows", "n_rows", "nrows", "num_rows"),
    "cols": ("cols", "n_cols", "ncols", "num_cols", "columns"),
    "orientation": ("orientation", "orientatn", "orient"),
}


def _norm_field(name: object) -> str:
    return "_".join(str(name).strip().lower().replace("-", " ").replace("_", " ").split())


def _field_keys() -> dict[str, str]:
    """Normalised field name -> the property it gives."""
    keys: dict[str, str] = {}
    for prop, names in FIELD_NAMES.items():
        for n in names:
            for k in (_norm_field(n), _norm_field(n)[:10]):
                if keys.setdefault(k, prop) != prop:
                    raise AssertionError(f"layout field {k} read for both {keys[k]} and {prop}")
    return keys


_FIELD_KEYS = _field_keys()


def layout_fields(columns: Iterable[Any]) -> tuple[dict[str, str], list[str]]:
    """Which column gives which layout property.

    Parameters
    ----------
    columns : iterable of str
        The layout's field names.

    Returns
    -------
    fields : dict
        Property (``module_id``, ``string_index``, ...) -> the column read for it.
    notes : list of str
        One line per property given by several columns (the preferred one is read).
    """
    found: dict[str, list[tuple[int, str]]] = {}
    for col in columns:
        if col == "geometry":
            continue
        key = _norm_field(col)
        prop = _FIELD_KEYS.get(key)
        if prop is None:
            continue
        names = [_norm_field(n) for n in FIELD_NAMES[prop]]
        rank = min((i for i, n in enumerate(names) if key in (n, n[:10])), default=len(names))
        found.setdefault(prop, []).append((rank, col))
    fields, notes = {}, []
    for prop, cands in found.items():
        cands.sort(key=lambda rc: (rc[0], str(rc[1])))
        fields[prop] = cands[0][1]
        if len(cands) > 1:
            notes.append(f"fields {', '.join(str(c) for _, c in cands)} all give {prop}; "
                         f"{cands[0][1]} is read")
    return fields, notes


def _whole(value: Any, field: str, name: str, path: Path) -> int | None:
    """A whole number from a field value (int, integral float, or text such as "3")."""
    if value is None:
        return None
    try:
        f = float(str(value).strip()) if isinstance(value, str) else float(value)
    except (TypeError, ValueError):
        raise LayoutError(f"{path}: {name}: {field} {value!r} is not a whole number") from None
    if not math.isfinite(f) or f != int(f):
        raise LayoutError(f"{path}: {name}: {field} {value!r} is not a whole number")
    return int(f)


def _ident(value: Any) -> str | None:
    """An id as text; whole numbers that a GIS stored as floats (12.0) read as "12"."""
    if value is None:
        return None
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    text = str(value).strip()
    return text or None


def _column(df: pd.DataFrame, *names: str) -> tuple[np.ndarray, np.ndarray]:
    """The first non-missing value among columns ``names`` of each row (object array) and
    whether there was one (None, NaN, NA and NaT count as missing)."""
    n = len(df)
    vals = np.full(n, None, dtype=object)
    have = np.zeros(n, bool)
    for name in names:
        if name in df.columns:
            col = df[name]
            take = ~have & ~col.isna().to_numpy()
            if take.any():
                vals[take] = col.to_numpy(dtype=object)[take]
                have |= take
    return vals, have


def _strs(vals: np.ndarray, have: np.ndarray) -> np.ndarray:
    """Ids as text (:func:`_ident`) of present values, None elsewhere (object array)."""
    out = np.full(len(vals), None, dtype=object)
    if have.any():
        out[have] = [_ident(v) for v in vals[have]]
    return out


def _ints(vals: np.ndarray, have: np.ndarray, field: str, where: np.ndarray, name_of: Callable[[int], str],
          path: Path) -> np.ndarray:
    """Whole numbers (:func:`_whole`) of present values, None elsewhere (object array);
    ``where`` gives each value's feature, named in the error."""
    out = np.full(len(vals), None, dtype=object)
    idx = np.flatnonzero(have)
    if idx.size and pd.api.types.infer_dtype(vals[idx], skipna=False) == "integer":
        # whole numbers already (the usual case): no per-feature parsing
        out[idx] = [int(v) for v in vals[idx]]
        return out
    for j in idx:
        try:
            out[j] = _whole(vals[j], field, "", path)
        except LayoutError:  # again with the feature's name (built only for the message)
            out[j] = _whole(vals[j], field, name_of(int(where[j])), path)
    return out
