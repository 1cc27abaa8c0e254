"""Table rows of a layout: row codes, module centres and the modules touching each module.

The modules frame (:mod:`pvscan.io.layout`) gives every module a table, a row within it and
a module-local frame; stages that compare a module with the modules beside it (seams along
a row, the local reference, the pattern tests) find them here.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

__all__ = ["row_keys", "module_centres", "adjacent_modules"]


def row_keys(modules: pd.DataFrame) -> np.ndarray:
    """Integer code of each module's table row (-1 when the table is unknown)."""
    n = len(modules)
    if "table_id" not in modules.columns:
        return np.full(n, -1, dtype=np.int64)
    table = modules["table_id"].astype("string").fillna("\x00none")
    if "table_row" in modules.columns:
        row = pd.to_numeric(modules["table_row"], errors="coerce").fillna(-1).astype(np.int64)
        key = table + "\x00" + row.astype(str)
    else:
        key = table
    codes, _ = pd.factorize(key)
    codes = np.asarray(codes, dtype=np.int64)
    codes[modules["table_id"].isna().to_numpy()] = -1
    return codes


def module_centres(modules: pd.DataFrame) -> np.ndarray:
    """Module centres from the module-local frame, ``f0 + (fu + fv) / 2`` [m], shape (n, 2)."""
    cols = ("fx0", "fy0", "fux", "fuy", "fvx", "fvy")
    if all(c in modules.columns for c in cols):
        f = {c: np.asarray(modules[c], dtype=float) for c in cols}
        return np.column_stack([f["fx0"] + 0.5 * (f["fux"] + f["fvx"]),
                                f["fy0"] + 0.5 * (f["fuy"] + f["fvy"])])
    geom = modules.geometry.centroid
    return np.column_stack([geom.x.to_numpy(), geom.y.to_numpy()])


def adjacent_modules(modules: pd.DataFrame, tol: float = 0.3) -> np.ndarray:
    """The modules touching each module across its four edges.

    Returns
    -------
    ndarray of int, shape (n, 4)
        Index of the module beyond the edge ``u = 0``, ``u = 1``, ``v = 0``, ``v = 1``
        (-1 when none): the module whose centre lies within ``tol`` of the centre of this
        module shifted by one module length (or width) plus a small gap [-] of the width.
    """
    n = len(modules)
    out = np.full((n, 4), -1, dtype=np.int64)
    if n < 2:
        return out
    xy = module_centres(modules)
    fu = modules[["fux", "fuy"]].to_numpy(dtype=float)
    fv = modules[["fvx", "fvy"]].to_numpy(dtype=float)
    width = np.hypot(fv[:, 0], fv[:, 1])
    finite = np.isfinite(xy).all(axis=1)
    tree = cKDTree(np.where(finite[:, None], xy, 1e12))
    for col, (vec, sign) in enumerate(((fu, -1), (fu, 1), (fv, -1), (fv, 1))):
        # the neighbour's centre sits one own extent away (plus a gap of a few
        # centimetres): take the nearest centre around that point
        target = xy + sign * vec
        d, j = tree.query(np.where(finite[:, None], target, 1e12), k=1)
        ok = finite & np.isfinite(d) & (d <= np.maximum(tol * width, 0.05) + 0.1) & (j != np.arange(n))
        out[ok, col] = j[ok]
    return out
