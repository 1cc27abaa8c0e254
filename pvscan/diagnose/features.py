"""What the pattern tests look at: residual cells, substrings and modules, vectorised.

Every module is compared with what its healthy neighbours look like, cell by cell: its
reference temperature (:mod:`pvscan.diagnose.thermal`) and the *shape* its neighbours share
(the median over the same neighbours of each cell's and substring's deviation from the
neighbour's own median: cooler frames, warm ground seen at a lower edge, reflection
gradients). The residual ``R = cell - reference - shape`` is what this module has and its
neighbours have not. :func:`build_features` gathers those residuals, the physical yardstick
``eta * G / U(v)`` (:func:`pvscan.physics.heat.open_module_rise`) and the noise levels into a
:class:`Features` record; each pattern test returns a :class:`Hits` record.

References
----------
.. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
"""
from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import cache
from typing import Any

import numpy as np
import pandas as pd

from pvscan.measure.rows import adjacent_modules, row_keys
from pvscan.physics.heat import Faiman
from pvscan.robust import MAD_TO_SIGMA, nanmedian, numpy_nanmedian_rows, scaled_mad

__all__ = ["Features", "Hits", "build_features", "row_geometry", "string_groups", "neighbour_median",
           "cell_neighbour_median",
           "quality", "fit_score", "confidence", "spec_value"]

logger = logging.getLogger(__name__)

#: Modules per chunk of the row-wise reductions of features and pattern tests (bounds their
#: temporaries; results do not depend on it).
CHUNK_MODULES = 8192


def spec_value(module_spec: Any, name: str, default: Any = None) -> Any:
    """A datasheet value of a ``ModuleSpec`` or of a mapping (``default`` when absent)."""
    if isinstance(module_spec, Mapping):
        return module_spec.get(name, default)
    return getattr(module_spec, name, default)


#: Values per neighbour slice of the neighbour medians (:func:`neighbour_median`,
#: :func:`cell_neighbour_median`): 16,384 float64 (128 KiB), so the slices of one chunk stay in
#: a core's cache while the sorting network passes over them again and again (2.2x faster
#: than 2,048 modules of 120 cells at a time on the 25k bench flight; results do not depend on it).
_SLICE_VALUES = 16384

#: Longest neighbour axis sorted by a sorting network (:func:`_nanmedian_first_axis`); longer
#: ones go to :func:`pvscan.robust.nanmedian` (a network's comparisons grow as k log^2 k).
_NETWORK_MAX = 16


@cache
def _network(k: int) -> tuple[tuple[int, int], ...]:
    """Comparators (i, j), i < j, of Batcher's odd-even merge sort of ``k`` inputs (19 for
    k = 8); comparators reaching past ``k`` are left out, which sorts ``k`` inputs as the
    network of the next power of two does with +inf in the extra inputs.

    References
    ----------
    .. [1] K. E. Batcher, "Sorting networks and their applications", AFIPS Spring Joint
       Computer Conference, 307-314, 1968. doi:10.1145/1468075.1468121
    """
    pairs = []
    p = 1
    while p < k:
        step = p
        while step >= 1:
            for j in range(step % p, k - step, 2 * step):
                for i in range(min(step, k - j - step)):
                    if (i + j) // (2 * p) == (i + j + step) // (2 * p):
                        pairs.append((i + j, i + j + step))
            step //= 2
        p *= 2
    return tuple(pairs)


@cache
def _median_network(k: int) -> tuple[tuple[int, int, bool, bool], ...]:
    """The comparators of :func:`_network` (``k`` inputs) that the median needs, as
    ``(i, j, min_used, max_used)``.

    The median of ``c <= k`` finite values (NaN as +inf, sorted last) reads the order
    statistics ``floor((c - 1) / 2)`` and the one after (:func:`pvscan.robust.sorted_quantile`),
    so only the outputs ``0 .. (k - 1) // 2 + 1`` of the network are read. Going back from
    them, a comparator none of whose outputs is read later is left out, and one whose min
    (max) output alone is read computes that output only; every output that is read holds
    the value of the whole network.
    """
    need = set(range(min(k - 1, (k - 1) // 2 + 1) + 1))
    kept = []
    for i, j in reversed(_network(k)):
        lo, hi = i in need, j in need
        if lo or hi:
            kept.append((i, j, lo, hi))
            need |= {i, j}
    return tuple(reversed(kept))


def _nanmedian_first_axis(g: np.ndarray) -> np.ndarray:
    """:func:`pvscan.robust.nanmedian` of ``g`` (k, ...) float64 along its first axis,
    overwriting ``g``: the same numbers, with each of the ``k`` values of an element in its
    own contiguous slice instead of along a short last axis.

    NaN is set to +inf so it sorts last (the order statistics below the count of finite
    values are those of a sort with NaN last), the slices are sorted element-wise by the
    comparators of :func:`_median_network` (``numpy.minimum`` / ``numpy.maximum``; the
    slices are swapped, not copied, after a comparator), and the median is read from the
    finite count with the arithmetic of :func:`pvscan.robust.sorted_quantile`.
    """
    k = len(g)
    flat = g.reshape(k, -1)  # a view of the contiguous g
    cnt = np.isfinite(flat).sum(axis=0)
    np.fmin(flat, np.inf, out=flat)  # NaN -> +inf, the rest as it is
    slots = list(flat)
    spare = np.empty(flat.shape[1:], dtype=g.dtype)
    for i, j, lo_used, hi_used in _median_network(k):
        a, b = slots[i], slots[j]
        if lo_used and hi_used:
            np.minimum(a, b, out=spare)
            np.maximum(a, b, out=b)
            slots[i], spare = spare, a
        elif lo_used:
            np.minimum(a, b, out=a)
        else:
            np.maximum(a, b, out=b)
    # sorted_quantile(sorted, cnt, 0.5): its positions and arithmetic, element by element;
    # first every element as if all k were finite, then those with fewer
    with np.errstate(invalid="ignore"):  # elements without a finite value: +inf - +inf, NaN below
        pos = 0.5 * max(k - 1, 0)
        lo, hi = int(np.floor(pos)), min(int(np.floor(pos)) + 1, max(k - 1, 0))
        out = slots[lo] + (pos - lo) * (slots[hi] - slots[lo])
        few = np.flatnonzero(cnt != k)
        if len(few):
            c = cnt[few]
            pos_f = 0.5 * np.maximum(c - 1, 0)
            lo_f = np.floor(pos_f).astype(np.int64)
            hi_f = np.minimum(lo_f + 1, np.maximum(c - 1, 0))
            sub = np.stack([s[few] for s in slots[:hi + 1]])
            col = np.arange(len(few))
            vlo, vhi = sub[lo_f, col], sub[hi_f, col]
            out[few] = np.where(c > 0, vlo + (pos_f - lo_f) * (vhi - vlo), np.nan)
    return out.reshape(g.shape[1:])


def neighbour_median(values: np.ndarray, nb: np.ndarray, chunk: int | None = None,
                     offset: np.ndarray | None = None) -> np.ndarray:
    """Median over each module's neighbours (``nb``, -1 = none) of ``values[neighbour]``.

    With ``offset`` (n,), of ``values[neighbour] - offset[neighbour]`` (each neighbour's
    values relative to its own offset, without a full-size copy of the differences).
    ``values`` is (n, ...) and the result has its shape (float64). Modules are taken
    ``chunk`` at a time (default: :data:`_SLICE_VALUES` values per neighbour), so the
    temporaries stay small whatever the plant size;
    each neighbour's values are gathered into their own contiguous slice and, up to
    :data:`_NETWORK_MAX` neighbours, sorted across the slices (:func:`_nanmedian_first_axis`),
    else by :func:`pvscan.robust.nanmedian`: the same numbers either way.
    """
    n = len(values)
    flat = np.asarray(values).reshape(n, -1)
    m = flat.shape[1]
    k = nb.shape[1] if nb.ndim == 2 else 0
    out = np.full((n, m), np.nan, dtype=np.float64)
    if k == 0:
        return out.reshape(np.shape(values))
    chunk = max(1, _SLICE_VALUES // max(m, 1)) if chunk is None else chunk
    off = None if offset is None else np.asarray(offset, dtype=np.float64)
    for s in range(0, n, chunk):
        idx = nb[s:s + chunk]
        g = np.empty((k, len(idx), m), dtype=np.float64)
        for j in range(k):
            col = idx[:, j]
            jj = np.maximum(col, 0)
            if off is None:
                g[j] = flat[jj]
            else:
                g[j] = flat[jj] - off[jj][:, None]
            g[j, col < 0] = np.nan
        if k <= _NETWORK_MAX:
            out[s:s + chunk] = _nanmedian_first_axis(g)
        else:
            out[s:s + chunk] = nanmedian(g, axis=0)
    return out.reshape(np.shape(values))


#: Offsets of a cell's neighbours within the module (the 3 x 3 box without its centre).
_BOX_OFFSETS = tuple((di, dj) for di in (-1, 0, 1) for dj in (-1, 0, 1) if (di, dj) != (0, 0))


def _row_median(a: np.ndarray, chunk: int = CHUNK_MODULES) -> np.ndarray:
    """:func:`pvscan.robust.nanmedian` of each row of the 2-D ``a``, ``chunk`` rows at a time."""
    out = np.empty(len(a), dtype=np.float64)
    for s in range(0, len(a), chunk):
        out[s:s + chunk] = nanmedian(a[s:s + chunk], axis=1)
    return out


def _cell_spread(R: np.ndarray, base: np.ndarray, rows: np.ndarray, chunk: int = CHUNK_MODULES) -> float:
    """``scaled_mad`` of the finite ``R - base`` over the cells of modules ``rows`` (bool),
    gathered chunk by chunk (one array of the values, no full-size temporaries)."""
    parts = []
    for s in range(0, len(R), chunk):
        sel = rows[s:s + chunk]
        if sel.any():
            x = R[s:s + chunk][sel] - base[s:s + chunk][sel][:, None, None]
            parts.append(x[np.isfinite(x)])
    v = np.concatenate(parts) if parts else np.zeros(0)
    if v.size < 3:  # as scaled_mad's min_count
        return float("nan")
    # scaled_mad(v), its medians taken in place (the same order statistics)
    med = np.median(v, overwrite_input=True)
    np.subtract(v, med, out=v)
    np.abs(v, out=v)
    return MAD_TO_SIGMA * float(np.median(v, overwrite_input=True))


def cell_neighbour_median(X: np.ndarray, chunk: int | None = None) -> np.ndarray:
    """Median of each cell's (up to 8) neighbouring cells within its module, NaN-aware.

    ``X`` is (n, A, C); cells beyond the module's edge and NaN cells are left out; a cell
    without a finite neighbour gives NaN. Modules are taken ``chunk`` at a time (default:
    :data:`_SLICE_VALUES` cells), each of the 8 neighbours in its own contiguous slice,
    sorted across them
    (:func:`_nanmedian_first_axis`; bounded temporaries).
    """
    X = np.asarray(X)
    n, A, C = X.shape
    out = np.empty((n, A, C), dtype=np.float64)
    chunk = max(1, _SLICE_VALUES // max(A * C, 1)) if chunk is None else chunk
    for s in range(0, n, chunk):
        P = np.pad(X[s:s + chunk], ((0, 0), (1, 1), (1, 1)), constant_values=np.nan)
        g = np.empty((len(_BOX_OFFSETS), P.shape[0], A, C), dtype=np.float64)
        for k, (di, dj) in enumerate(_BOX_OFFSETS):
            g[k] = P[:, 1 + di:1 + di + A, 1 + dj:1 + dj + C]
        out[s:s + chunk] = _nanmedian_first_axis(g)
    return out


@dataclass
class Features:
    """Everything the pattern functions look at, vectorised over modules.

    Temperatures [degC], differences [K]; ``R*`` arrays are residuals: measured minus
    reference minus the shape the healthy neighbours share.
    """

    n: int
    n_along: int
    n_across: int
    nsub: int
    ok: np.ndarray            # (n,) bool: classified
    ref: np.ndarray           # (n,) reference [degC]
    t_median: np.ndarray      # (n,)
    t_max: np.ndarray         # (n,)
    dT: np.ndarray            # (n,) t_median - ref [K]
    rise: np.ndarray          # (n,) open-module rise at the module [K]
    cm: np.ndarray            # (n, A, C) cell median [degC]
    cp: np.ndarray            # (n, A, C) cell p95 [degC]
    R: np.ndarray             # (n, A, C) cell-median residual [K]
    R95: np.ndarray           # (n, A, C) cell-p95 residual [K]
    Rsub: np.ndarray          # (n, B) substring-median residual [K]
    base: np.ndarray          # (n,) median residual over the module's cells [K]
    base_sub: np.ndarray      # (n, B) median residual over each substring's cells [K]
    col_sub: np.ndarray       # (C,) substring of each cell column
    lower_u: np.ndarray       # (n,) bool: lower edge at u = 0 (else v = 0)
    sig_cell: float           # robust spread of healthy cell residuals [K]
    sig_mod: float            # robust spread of healthy module residuals [K]
    split_box: bool
    extra: dict[str, Any] = field(default_factory=dict)


@dataclass
class Hits:
    """Result of one pattern function.

    Attributes
    ----------
    defect : str
    hit : ndarray of bool (n,)
    confidence : ndarray (n,) [0..1]
    temp_c : ndarray (n,)
        Region temperature (p95 for spot patterns, median for area patterns) [degC].
    region : dict[int, str]
    boxes : dict[int, list of (u0, u1, v0, v1)]
    """

    defect: str
    hit: np.ndarray
    confidence: np.ndarray
    temp_c: np.ndarray
    region: dict[int, str] = field(default_factory=dict)
    boxes: dict[int, list[tuple[float, float, float, float]]] = field(default_factory=dict)


def quality(signal: Any, threshold: Any) -> np.ndarray:
    """0..1: how clearly a signal clears its threshold (0 at the threshold, 1 at twice it)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        q = (np.asarray(signal, float) - threshold) / np.maximum(np.abs(threshold), 1e-6)
    return np.clip(np.nan_to_num(q, nan=0.0), 0.0, 1.0)


def fit_score(ratio: Any, tol: float = 0.35) -> np.ndarray:
    """0..1: how well a rise fits the physical yardstick (log-normal closeness)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        x = np.log(np.where(ratio > 0, ratio, np.nan)) / tol
    return np.nan_to_num(np.exp(-0.5 * x * x), nan=0.0)


def confidence(*terms: Any) -> np.ndarray:
    """0.4..1: the product of 0..1 quality terms mapped onto a confidence (0.4 at none)."""
    q = np.ones_like(np.asarray(terms[0], float))
    for t in terms:
        q = q * np.asarray(t, float)
    return np.clip(0.4 + 0.6 * q, 0.0, 1.0)


def build_features(modules: pd.DataFrame, stats: Any, conditions: pd.DataFrame, module_spec: Any,
                   ref: np.ndarray, nb: np.ndarray, ok: np.ndarray, cfg: Mapping[str, Any],
                   cfg_ref: Mapping[str, Any], heat: Faiman, ref_irr: np.ndarray | None = None,
                   spread_from: np.ndarray | None = None) -> Features:
    """The residuals and yardsticks of every module against reference ``ref`` [degC].

    Parameters
    ----------
    modules : DataFrame
        Modules with ``lower_edge`` (``"u"`` or ``"v"``).
    stats : ZonalStats-like
        True glass temperatures [degC]: ``table``, ``cell_median``, ``cell_p95``,
        ``cell_count``, ``sub_median``.
    conditions : DataFrame
        ``poa_global`` [W/m2], ``temp_air`` [degC], ``wind_speed`` [m/s] per module.
    module_spec : ModuleSpec-like
        ``efficiency``, ``junction_box``.
    ref : ndarray
        Reference temperature per module [degC].
    nb : ndarray of int (n, k)
        The neighbours the reference came from (-1 none): they give the shared shape.
    ok : ndarray of bool
        Modules classified.
    cfg, cfg_ref : mapping
        ``[classify]`` and ``[reference]`` settings.
    heat : Faiman
        The heat-loss model of the run.
    ref_irr : ndarray, optional
        Reference used to read the local irradiance (default ``ref``) [degC].
    spread_from : ndarray of bool, optional
        Modules whose delta T gives the module-to-module spread ``sig_mod`` (default: every
        classified module; the robust spread ignores the few defective ones).
    """
    table = stats.table
    cm = np.asarray(stats.cell_median, dtype=np.float64)
    cp = np.asarray(stats.cell_p95, dtype=np.float64)
    cc = np.asarray(stats.cell_count)
    n, A, C = cm.shape
    sm = np.asarray(stats.sub_median, dtype=np.float64)
    B = sm.shape[1]
    t_med = table["t_median_c"].to_numpy(dtype=float)
    t_max = table["t_max_c"].to_numpy(dtype=float)

    # cells with too few pixels compared to the module's typical cell are left out
    typ = np.empty(n, dtype=np.float64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        for i0 in range(0, n, CHUNK_MODULES):
            c = cc[i0:i0 + CHUNK_MODULES]
            typ[i0:i0 + CHUNK_MODULES] = numpy_nanmedian_rows(np.where(c > 0, c, np.nan).reshape(len(c), -1))
    thin = cc < float(cfg["min_cell_fraction"]) * np.nan_to_num(typ, nan=1.0)[:, None, None]
    if thin.any():
        cm = np.where(thin, np.nan, cm)
        cp = np.where(thin, np.nan, cp)
    else:
        # nothing left out: the statistics' own arrays, read-only (two (modules x cells)
        # copies fewer while the pattern tests run, the largest memory of the run)
        cm, cp = cm.view(), cp.view()
        cm.flags.writeable = False
        cp.flags.writeable = False
    del thin

    # the shape the healthy neighbours share, relative to each neighbour's own median; the
    # residuals built in place (the same operations in the same order, fewer full-size copies)
    R = cm - ref[:, None, None]
    shape = np.nan_to_num(neighbour_median(cm, nb, offset=t_med), nan=0.0, copy=False)
    R -= shape
    del shape
    R95 = cp - ref[:, None, None]
    shape = np.nan_to_num(neighbour_median(cp, nb, offset=t_med), nan=0.0, copy=False)
    R95 -= shape
    del shape
    shape_s = np.nan_to_num(neighbour_median(sm - t_med[:, None], nb), nan=0.0, copy=False)
    Rsub = sm - ref[:, None] - shape_s

    col_sub = np.minimum(((np.arange(C) + 0.5) / C * B).astype(int), B - 1)
    base = _row_median(R.reshape(n, -1))
    base_sub = np.stack([_row_median(R[:, :, col_sub == k].reshape(n, -1)) for k in range(B)], axis=1)

    g = conditions["poa_global"].to_numpy(dtype=float) if "poa_global" in conditions else np.full(n, np.nan)
    ws = conditions["wind_speed"].to_numpy(dtype=float) if "wind_speed" in conditions else np.full(n, 1.0)
    ta = conditions["temp_air"].to_numpy(dtype=float) if "temp_air" in conditions else np.full(n, np.nan)
    eta: float | np.ndarray = float(spec_value(module_spec, "efficiency"))
    gamma = spec_value(module_spec, "gamma_pmax_pct_per_k")
    if gamma is not None:
        # the power an open module no longer delivers is that of the operating point: the
        # efficiency at the producing neighbours' temperature, eta * (1 + gamma_pmax *
        # (T - 25 degC)) (datasheet temperature coefficient, IEC 61215 / IEC 60891; the same
        # operating efficiency as diagnose/loss.py), about 8 % below eta_STC at 48 degC
        with np.errstate(invalid="ignore"):
            f_t = 1.0 + float(gamma) / 100.0 * (ref - 25.0)
        eta = eta * np.clip(np.where(np.isfinite(f_t), f_t, 1.0), 0.5, 1.2)
    eta = np.asarray(eta, dtype=float)
    rise = np.asarray(heat.open_module_rise(eta, g, ws), dtype=float)
    if bool(cfg["local_irradiance"]):
        # Faiman: a producing module runs G / U(v) above the air, so the local reference's
        # rise over ambient tells the irradiance the module actually got (cloud shadows,
        # drift the irradiance sensor did not see): G_local = (T_ref - T_air) * U(v)
        # (ref_irr: the mean of the row reference and the out-of-string one, two
        # neighbourhoods, so a steep shadow edge along one of them does not decide alone)
        r_irr = ref if ref_irr is None else np.where(np.isfinite(ref_irr), ref_irr, ref)
        with np.errstate(invalid="ignore", divide="ignore"):
            s = (r_irr - ta) * heat.u(ws) / g
        s = np.clip(s, float(cfg["local_irradiance_min"]), float(cfg["local_irradiance_max"]))
        rise = rise * np.where(np.isfinite(s), s, 1.0)
    if not np.isfinite(rise).any():
        logger.warning("no irradiance for the open-module rise; area patterns use 3 K")
        rise = np.full(n, 3.0)
    else:
        rise = np.where(np.isfinite(rise), rise, nanmedian(rise))

    lower = modules["lower_edge"].astype(str).to_numpy() if "lower_edge" in modules else np.full(n, "u")
    lower_u = lower != "v"

    dT = t_med - ref
    healthy = ok & np.isfinite(dT)
    if spread_from is not None:
        healthy &= np.asarray(spread_from, bool)
    sig_mod = scaled_mad(dT[healthy])
    sig_cell = _cell_spread(R, base, healthy) if healthy.any() else float("nan")
    sig_mod = 0.5 if not np.isfinite(sig_mod) else sig_mod
    sig_cell = 0.3 if not np.isfinite(sig_cell) else sig_cell
    split = str(spec_value(module_spec, "junction_box", "edge") or "edge") == "split"
    # the open-module rise at the reference conditions, to scale rises given there
    # (with the flight's median operating efficiency, so rise / rise_ref scales the conditions only)
    eta_med = float(np.nanmedian(eta)) if np.isfinite(eta).any() else float(spec_value(module_spec, "efficiency"))
    rise_ref = float(heat.open_module_rise(eta_med, float(cfg_ref["g_ref_w_m2"]), float(cfg_ref["wind_ref_m_s"])))
    F = Features(n=n, n_along=A, n_across=C, nsub=B, ok=ok, ref=ref, t_median=t_med, t_max=t_max,
                    dT=dT, rise=rise, cm=cm, cp=cp, R=R, R95=R95, Rsub=Rsub, base=base,
                    base_sub=base_sub, col_sub=col_sub, lower_u=lower_u, sig_cell=sig_cell,
                    sig_mod=sig_mod, split_box=split)
    F.extra["rise_ref"] = rise_ref
    return F


def row_geometry(modules: pd.DataFrame, nsub: int) -> dict[str, np.ndarray]:
    """Adjacency, substring centres and the v = 0 / v = 1 edge midpoints in map coordinates."""
    f = {c: modules[c].to_numpy(dtype=float) for c in ("fx0", "fy0", "fux", "fuy", "fvx", "fvy")}
    p0 = np.column_stack([f["fx0"], f["fy0"]])
    fu = np.column_stack([f["fux"], f["fuy"]])
    fv = np.column_stack([f["fvx"], f["fvy"]])
    vk = (np.arange(nsub) + 0.5) / nsub
    centres = p0[:, None, :] + 0.5 * fu[:, None, :] + vk[None, :, None] * fv[:, None, :]
    edges = np.stack([p0 + 0.5 * fu, p0 + 0.5 * fu + fv], axis=1)
    adj = adjacent_modules(modules)
    n = len(modules)
    cross = np.full(n, -1, np.int64)
    along = np.full((n, 4), -1, np.int64)
    if "table_id" in modules.columns and "table_row" in modules.columns:
        tkey = np.asarray(pd.factorize(modules["table_id"].astype("string"))[0])
        trow = pd.to_numeric(modules["table_row"], errors="coerce").fillna(-1).to_numpy(np.int64)
        for c in range(4):
            j = adj[:, c]
            jj = np.maximum(j, 0)
            same_t = (j >= 0) & (tkey[jj] == tkey) & (tkey >= 0)
            other_row = same_t & (trow[jj] != trow)
            cross = np.where((cross < 0) & other_row, j, cross)
            along[:, c] = np.where(same_t & (trow[jj] == trow), j, -1)
    return {"adjacent": adj, "sub_centres": centres, "edge_points": edges, "cross_row": cross,
            "along_row": along, "row_key": row_keys(modules),
            "centre": p0 + 0.5 * (fu + fv), "p0": p0, "fu": fu, "fv": fv}


def string_groups(modules: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, bool]:
    """Group code (string, else table row) and the position along it for each module."""
    n = len(modules)
    has_string = ("string_id" in modules.columns and "string_index" in modules.columns
                  and modules["string_id"].notna().any())
    if has_string:
        key = modules["string_id"].astype("string")
        pos = pd.to_numeric(modules["string_index"], errors="coerce").to_numpy(dtype=float)
        codes, _ = pd.factorize(key)
        codes = np.asarray(codes, np.int64)
        codes[modules["string_id"].isna().to_numpy() | ~np.isfinite(pos)] = -1
        return codes, pos, True
    if "table_id" in modules.columns:
        row = modules["table_row"] if "table_row" in modules.columns else pd.Series(0, index=modules.index)
        key = modules["table_id"].astype("string") + "\x00" + row.astype("string")
        codes, _ = pd.factorize(key)
        pos = pd.to_numeric(modules.get("table_col", pd.Series(np.arange(n))), errors="coerce").to_numpy(float)
        codes = np.asarray(codes, np.int64)
        codes[modules["table_id"].isna().to_numpy()] = -1
        return codes, pos, False
    return np.full(n, -1, np.int64), np.arange(n, dtype=float), False
