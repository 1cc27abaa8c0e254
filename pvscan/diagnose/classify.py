"""Defect patterns in the module-local frame, and their severity.

Every module is compared with what its healthy neighbours look like, cell by cell:

1. its reference temperature (:func:`pvscan.diagnose.thermal.local_reference`, robust, same row
   first) and the *shape* its neighbours share (the median over the same neighbours of
   each cell's and substring's deviation from the neighbour's own median: cooler frames,
   warm ground seen at a lower edge, reflection gradients). The residual
   ``R = cell - reference - shape`` is what this module has and its neighbours have not;
2. the physical yardstick ``eta * G / U(v)`` (:func:`pvscan.diagnose.thermal.open_module_rise`):
   a substring whose bypass diode conducts, a module or a string that is open, turns the
   power it no longer delivers into heat, so its residual plateau must fit that rise. A
   raised strip that fits it is a bypassed substring; a whole module at that rise is open;
3. one small function per pattern (``pattern_*``), all vectorised over modules, each
   returning the modules it recognises, the region, the region's temperature and a
   confidence;
4. string-level patterns on top: a run of consecutive open modules of one string (or
   table row) is one ``open_string``, judged against a reference that excludes the
   string itself; potential-induced degradation (``pid``) is a string whose modules near
   the negative end run warmer with a patchy, edge-weighted cell pattern that fades
   along the string;
5. overlapping patterns get one class (``precedence``) with the others listed in
   ``other_defects``, then :func:`assign_severity` sets ``severity`` and ``iec_class``.

Two passes: the first finds suspects, which are then excluded from every neighbour's
reference before the second, final pass.

References
----------
.. [1] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
.. [2] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
"""
from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import ndimage

from pvscan.diagnose.thermal import (_REFERENCE_DEFAULTS, _section, faiman_u, local_reference,
                            normalise_delta_t, open_module_rise)

__all__ = [
    "classify",
    "assign_severity",
    "ANOMALY_COLUMNS",
    "DEFECTS",
    "SPOT_DEFECTS",
    "pattern_open_module",
    "open_module_floor",
    "pattern_bypassed_substring",
    "pattern_hot_cell",
    "pattern_junction_box",
    "pattern_soiling",
    "pattern_open_string",
    "pattern_pid",
    "adjacent_modules",
]

logger = logging.getLogger(__name__)

#: Columns of the anomalies DataFrame, in order (see DEVELOPERS.md).
ANOMALY_COLUMNS = [
    "module_index", "module_id", "module_indices", "module_ids", "defect", "other_defects",
    "region", "region_uv", "delta_t_k", "delta_t_norm_k", "t_max_c", "confidence",
    "severity", "iec_class",
]

#: The defect vocabulary.
DEFECTS = ("hot_cell", "several_hot_cells", "bypassed_substring", "several_bypassed_substrings",
           "open_module", "open_string", "pid", "soiling", "junction_box")

#: Patterns whose region temperature is its 95th percentile (the others: the median).
SPOT_DEFECTS = frozenset({"hot_cell", "several_hot_cells", "junction_box"})

_CLASSIFY_DEFAULTS = {
    "min_valid_fraction": 0.6,
    "min_cell_fraction": 0.2,
    "noise_z": 5.0,
    "module_z": 3.0,
    "local_irradiance": True,
    "local_irradiance_min": 0.4,
    "local_irradiance_max": 1.3,
    "open_ratio_min": 0.55,
    "open_ratio_max": 1.8,
    "open_prior": 0.002,
    "open_other_share": 0.9,
    "open_uniform_iqr": 0.35,
    "open_uniform_floor_k": 0.8,
    "substring_raise_min": 0.5,
    "substring_rest_max": 0.25,
    "substring_ratio_min": 0.5,
    "substring_ratio_max": 1.8,
    "substring_cover_min": 0.8,
    "substring_partial_max": 0.3,
    "substring_column_chi2_max": 4.0,
    "substring_line_tol_m": 0.3,
    "hot_cell_min_k": 3.0,
    "hot_cell_whole_min": 0.5,
    "hot_cell_contrast_min": 0.5,
    "hot_cell_peak_share": 0.6,
    "hot_cell_merge_touching": True,
    "hot_cell_merge_max_cells": 2,
    "junction_box_min_k": 1.5,
    "junction_box_spot_max": 0.85,
    "junction_box_straddle_min": 0.4,
    "soiling_min_norm_k": 2.0,
    "soiling_cover_min": 0.7,
    "soiling_top_max": 0.3,
    "open_string_min_modules": 2,
    "open_string_candidate_z": 1.5,
    "open_string_run_z": 5.0,
    "open_string_ratio_min": 0.55,
    "open_string_end_z": 1.0,
    "open_string_rest_max": 0.5,
    "open_string_beyond_max": 0.5,
    "open_string_row_radius_m": 5.0,
    "open_string_cross_min": 0.4,
    "open_string_cross_fail_max": 0.1,
    "open_string_row_share": 0.35,
    "pid_min_modules": 2,
    "pid_seed_z": 2.0,
    "pid_z_cap": 3.0,
    "pid_extend_z": 1.0,
    "pid_run_z": 4.0,
    "pid_rest_z": 2.0,
    "pid_excess_weight": 0.5,
    "pid_max_position": 0.5,
    "pid_warm_min_z": -0.5,
    "precedence": ["open_string", "open_module", "several_bypassed_substrings", "bypassed_substring",
                   "soiling", "junction_box", "pid", "several_hot_cells", "hot_cell"],
}

_SEVERITY_DEFAULTS = {
    "safety_t_max_c": 100.0,
    "safety_delta_t_norm_k": 40.0,
    "safety_junction_box_delta_t_norm_k": 20.0,
    "repair_hot_cell_delta_t_norm_k": 10.0,
    "monitor_defects": ["soiling"],
    "iec_class_safety": "CoA 3",
    "iec_class_other": "CoA 2",
}


# --------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------

def _nanquantile(a, q, axis=None):
    """Quantile ``q`` (0..1, linear interpolation) ignoring NaN, vectorised along ``axis``.

    NumPy's nanpercentile loops over rows in Python; sorting once (NaN sort last) and
    indexing by each row's count of valid values is the same estimate, thousands of times
    faster for (modules x cells) arrays. All-NaN rows give NaN, without a warning.
    """
    a = np.asarray(a, dtype=np.float64)
    if axis is None:
        a = a.reshape(-1)
        axis = 0
    a = np.moveaxis(a, axis, -1)
    srt = np.sort(a, axis=-1)
    cnt = np.isfinite(srt).sum(axis=-1)
    pos = q * np.maximum(cnt - 1, 0)
    lo = np.floor(pos).astype(np.int64)
    hi = np.minimum(lo + 1, np.maximum(cnt - 1, 0))
    w = pos - lo
    vlo = np.take_along_axis(srt, lo[..., None], axis=-1)[..., 0]
    vhi = np.take_along_axis(srt, hi[..., None], axis=-1)[..., 0]
    out = vlo + w * (vhi - vlo)
    return np.where(cnt > 0, out, np.nan)


def _nanmedian(a, axis=None):
    return _nanquantile(a, 0.5, axis=axis)


def _nanpercentile(a, q, axis=None):
    qs = np.atleast_1d(np.asarray(q, float)) / 100.0
    return np.stack([_nanquantile(a, x, axis=axis) for x in qs], axis=0)


def _nanmean(a, axis=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(a, axis=axis)


def _nanmax(a, axis=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmax(a, axis=axis)


def _nanmin(a, axis=None):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmin(a, axis=axis)


def _robust_sigma(x) -> float:
    x = np.asarray(x, float)
    x = x[np.isfinite(x)]
    if x.size < 3:
        return float("nan")
    return 1.4826 * float(np.median(np.abs(x - np.median(x))))


def _spec(module_spec, name, default=None):
    if isinstance(module_spec, Mapping):
        return module_spec.get(name, default)
    return getattr(module_spec, name, default)


def _neighbour_median(values: np.ndarray, nb: np.ndarray, chunk: int = 2048) -> np.ndarray:
    """Median over each module's neighbours (``nb``, -1 = none) of ``values[neighbour]``."""
    n = len(values)
    out = np.full(values.shape, np.nan, dtype=np.float64)
    for s in range(0, n, chunk):
        idx = nb[s:s + chunk]
        g = values[np.maximum(idx, 0)].astype(np.float64)
        g[idx < 0] = np.nan
        out[s:s + chunk] = _nanmedian(g, axis=1)
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
    extra: dict = field(default_factory=dict)


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
    region: dict = field(default_factory=dict)
    boxes: dict = field(default_factory=dict)


def _quality(signal, threshold):
    """0..1: how clearly a signal clears its threshold (0 at the threshold, 1 at twice it)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        q = (np.asarray(signal, float) - threshold) / np.maximum(np.abs(threshold), 1e-6)
    return np.clip(np.nan_to_num(q, nan=0.0), 0.0, 1.0)


def _fit(ratio, tol=0.35):
    """0..1: how well a rise fits the physical yardstick (log-normal closeness)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        x = np.log(np.where(ratio > 0, ratio, np.nan)) / tol
    return np.nan_to_num(np.exp(-0.5 * x * x), nan=0.0)


def _conf(*terms):
    q = np.ones_like(np.asarray(terms[0], float))
    for t in terms:
        q = q * np.asarray(t, float)
    return np.clip(0.4 + 0.6 * q, 0.0, 1.0)


# --------------------------------------------------------------------------------------
# features
# --------------------------------------------------------------------------------------

def _features(modules, stats, conditions, module_spec, ref, nb, ok, cfg, cfg_ref, ref_irr=None) -> Features:
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
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        typ = np.nanmedian(np.where(cc > 0, cc, np.nan).reshape(n, -1), axis=1)
    thin = cc < float(cfg["min_cell_fraction"]) * np.nan_to_num(typ, nan=1.0)[:, None, None]
    cm = np.where(thin, np.nan, cm)
    cp = np.where(thin, np.nan, cp)

    # the shape the healthy neighbours share, relative to each neighbour's own median
    shape_c = _neighbour_median(cm - t_med[:, None, None], nb)
    shape_p = _neighbour_median(cp - t_med[:, None, None], nb)
    shape_s = _neighbour_median(sm - t_med[:, None], nb)
    shape_c = np.nan_to_num(shape_c, nan=0.0)
    shape_p = np.nan_to_num(shape_p, nan=0.0)
    shape_s = np.nan_to_num(shape_s, nan=0.0)
    R = cm - ref[:, None, None] - shape_c
    R95 = cp - ref[:, None, None] - shape_p
    Rsub = sm - ref[:, None] - shape_s

    col_sub = np.minimum(((np.arange(C) + 0.5) / C * B).astype(int), B - 1)
    base = _nanmedian(R.reshape(n, -1), axis=1)
    base_sub = np.stack([_nanmedian(R[:, :, col_sub == k].reshape(n, -1), axis=1) for k in range(B)], axis=1)

    g = conditions["poa_global"].to_numpy(dtype=float) if "poa_global" in conditions else np.full(n, np.nan)
    ws = conditions["wind_speed"].to_numpy(dtype=float) if "wind_speed" in conditions else np.full(n, 1.0)
    ta = conditions["temp_air"].to_numpy(dtype=float) if "temp_air" in conditions else np.full(n, np.nan)
    eta = float(_spec(module_spec, "efficiency"))
    u0, u1 = float(cfg_ref["u0"]), float(cfg_ref["u1"])
    rise = np.asarray(open_module_rise(eta, g, ws, u0, u1), dtype=float)
    if bool(cfg["local_irradiance"]):
        # Faiman: a producing module runs G / U(v) above the air, so the local reference's
        # rise over ambient tells the irradiance the module actually got (cloud shadows,
        # drift the irradiance sensor did not see): G_local = (T_ref - T_air) * U(v)
        # (ref_irr: the mean of the row reference and the out-of-string one, two
        # neighbourhoods, so a steep shadow edge along one of them does not decide alone)
        r_irr = ref if ref_irr is None else np.where(np.isfinite(ref_irr), ref_irr, ref)
        with np.errstate(invalid="ignore", divide="ignore"):
            s = (r_irr - ta) * faiman_u(ws, u0, u1) / g
        s = np.clip(s, float(cfg["local_irradiance_min"]), float(cfg["local_irradiance_max"]))
        rise = rise * np.where(np.isfinite(s), s, 1.0)
    if not np.isfinite(rise).any():
        logger.warning("no irradiance for the open-module rise; area patterns use 3 K")
        rise = np.full(n, 3.0)
    else:
        rise = np.where(np.isfinite(rise), rise, _nanmedian(rise))

    lower = modules["lower_edge"].astype(str).to_numpy() if "lower_edge" in modules else np.full(n, "u")
    lower_u = lower != "v"

    dT = t_med - ref
    healthy = ok & np.isfinite(dT)
    sig_mod = _robust_sigma(dT[healthy])
    X = R - base[:, None, None]
    sig_cell = _robust_sigma(X[healthy].ravel()) if healthy.any() else float("nan")
    sig_mod = 0.5 if not np.isfinite(sig_mod) else sig_mod
    sig_cell = 0.3 if not np.isfinite(sig_cell) else sig_cell
    split = str(_spec(module_spec, "junction_box", "edge") or "edge") == "split"
    # the open-module rise at the reference conditions, to scale rises given there
    rise_ref = float(open_module_rise(eta, float(cfg_ref.get("g_ref_w_m2", 1000.0)),
                                      float(cfg_ref.get("wind_ref_m_s", 1.0)), u0, u1))
    F = Features(n=n, n_along=A, n_across=C, nsub=B, ok=ok, ref=ref, t_median=t_med, t_max=t_max,
                    dT=dT, rise=rise, cm=cm, cp=cp, R=R, R95=R95, Rsub=Rsub, base=base,
                    base_sub=base_sub, col_sub=col_sub, lower_u=lower_u, sig_cell=sig_cell,
                    sig_mod=sig_mod, split_box=split)
    F.extra["rise_ref"] = rise_ref
    return F


def adjacent_modules(modules: pd.DataFrame, tol: float = 0.3) -> np.ndarray:
    """The modules touching each module across its four edges.

    Returns
    -------
    ndarray of int, shape (n, 4)
        Index of the module beyond the edge ``u = 0``, ``u = 1``, ``v = 0``, ``v = 1``
        (-1 when none): the module whose centre lies within ``tol`` of the centre of this
        module shifted by one module length (or width) plus a small gap [-] of the width.
    """
    from scipy.spatial import cKDTree

    from pvscan.diagnose.thermal import module_centres

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


# --------------------------------------------------------------------------------------
# pattern functions (one per pattern, vectorised over modules)
# --------------------------------------------------------------------------------------

def _iqr(x, axis):
    q = _nanpercentile(x, [25, 75], axis=axis)
    return q[1] - q[0]


def open_module_floor(rise, sigma, z_min: float, prior: float):
    """Least module rise [K] called an open module: a likelihood-ratio test.

    A healthy module's delta T scatters as ``N(0, sigma)`` (the module-to-module spread);
    an open module's as ``N(rise, sigma)`` with ``rise = eta * G / U`` (the same spread,
    shifted by the heat of the power it no longer delivers). With a prior share ``prior``
    of open modules, the open hypothesis is the more probable above

        ``rise / 2 + sigma**2 * ln((1 - prior) / prior) / rise``

    (equal-variance Gaussian classes); the floor is that, and at least ``z_min * sigma``.
    When the rise is many spreads the floor sits near half the rise; when it is only a few
    (low irradiance, strong wind) it climbs above the rise, since then a warm healthy
    module is likelier than an open one.

    Parameters
    ----------
    rise : array-like
        Open-module rise at each module [K].
    sigma : float
        Robust spread of healthy modules' delta T [K].
    z_min : float
        Least floor in spreads [-].
    prior : float
        Prior share of open modules among modules (0..1) [-].

    Returns
    -------
    ndarray
        Floor [K].
    """
    r = np.maximum(np.asarray(rise, float), 1e-6)
    p = float(np.clip(prior, 1e-9, 0.5))
    lr = r / 2.0 + sigma * sigma * np.log((1.0 - p) / p) / r
    return np.maximum(z_min * sigma, lr)


def pattern_open_module(F: Features, cfg: Mapping, rsub=None, dT=None, isolated: bool = True) -> Hits:
    """A whole module raised uniformly by about the open-module rise ``eta * G / U``.

    Parameters
    ----------
    F : Features
    cfg : mapping
        ``[classify]`` settings (``open_ratio_min``, ``open_ratio_max``, ``open_uniform_iqr``,
        ``open_uniform_floor_k``, ``substring_raise_min``).
    rsub, dT : ndarray, optional
        Substring and module residuals against another reference (used by the open-string
        test, whose reference excludes the string itself).
    isolated : bool
        Require that no module touching this one is raised as much (a raised area that
        carries on into the next module is an image artefact such as a mosaic seam, or
        a run of open modules, which :func:`pattern_open_string` judges).

    Returns
    -------
    Hits
        Region ``module``, box (0, 1, 0, 1); region temperature = the module's median.
    """
    rsub = F.Rsub if rsub is None else rsub
    dT = F.dT if dT is None else dT
    r = F.rise
    lo = _nanmin(rsub, axis=1)
    ratio = dT / r
    spread = _iqr((F.R - F.base[:, None, None]).reshape(F.n, -1), axis=1)
    uniform = spread <= np.maximum(float(cfg["open_uniform_iqr"]) * r, float(cfg["open_uniform_floor_k"]))
    floor = open_module_floor(r, F.sig_mod, float(cfg["module_z"]), float(cfg["open_prior"]))
    hit = (F.ok & (lo >= float(cfg["substring_raise_min"]) * r) & (ratio >= float(cfg["open_ratio_min"]))
           & (ratio <= float(cfg["open_ratio_max"])) & uniform & (dT >= floor))
    if isolated and "adjacent" in F.extra:
        adj = F.extra["adjacent"]
        t_adj = np.where(adj >= 0, F.t_median[np.maximum(adj, 0)], np.nan)
        with np.errstate(invalid="ignore"):
            carried = ((t_adj - (F.t_median - dT)[:, None]) >= 0.5 * dT[:, None]).any(axis=1)
        hit &= ~carried
    conf = _conf(_fit(ratio), _quality(dT, floor))
    h = Hits("open_module", hit, conf, F.ref + dT)
    for i in np.flatnonzero(hit):
        h.region[i] = "module"
        h.boxes[i] = [(0.0, 1.0, 0.0, 1.0)]
    return h


def pattern_bypassed_substring(F: Features, cfg: Mapping, final: bool = True) -> tuple[Hits, Hits]:
    """One (or several, not all) substrings raised as a uniform plateau fitting the rise.

    A conducting bypass diode leaves its substring's cells producing nothing, so the whole
    strip (substring ``k = floor(v * bypass_diodes)``, running the full length) runs
    ``eta * G / U`` warmer than the producing substrings. The plateau must be aligned with
    the substring boundaries: every cell column inside raised, every column outside not,
    and flat within (a mosaic seam or a reflection crossing the module at an angle is not).

    Returns
    -------
    (Hits, Hits)
        ``bypassed_substring`` and ``several_bypassed_substrings``; region temperature = the
        median of the raised substrings.
    """
    n, B = F.n, F.nsub
    r = F.rise
    lo = _nanmin(F.Rsub, axis=1)
    raise_k = F.Rsub - lo[:, None]
    raised = raise_k >= float(cfg["substring_raise_min"]) * r[:, None]
    rest_ok = np.where(raised, True, raise_k <= float(cfg["substring_rest_max"]) * r[:, None])
    nr = raised.sum(axis=1)
    clean = rest_ok.all(axis=1) & (nr >= 1) & (nr < B)
    with np.errstate(invalid="ignore"):
        mean_raise = np.where(nr > 0, np.nansum(np.where(raised, raise_k, 0.0), axis=1) / np.maximum(nr, 1), np.nan)
    ratio = mean_raise / r
    fit_ok = (ratio >= float(cfg["substring_ratio_min"])) & (ratio <= float(cfg["substring_ratio_max"]))
    floor = float(cfg["noise_z"]) * F.sig_cell
    if final:
        # a strip's median averages its cells: in the final pass the floor is the noise
        # of a difference of two strip means (the first pass, which only picks suspects,
        # keeps the cell floor)
        n_strip = max(F.n_along * F.n_across // max(B, 1), 1)
        floor = floor * np.sqrt(2.0 / n_strip)
    # column coverage: inside raised columns every cell at least half the plateau, outside none
    Xlo = F.R - _nanmin(F.base_sub, axis=1)[:, None, None]
    half = 0.5 * mean_raise[:, None, None]
    col_raised = raised[:, F.col_sub]                      # (n, C)
    up = Xlo >= half
    valid = np.isfinite(Xlo)
    inside = col_raised[:, None, :] & valid
    outside = ~col_raised[:, None, :] & valid
    with np.errstate(invalid="ignore", divide="ignore"):
        cover_in = (up & inside).sum(axis=(1, 2)) / np.maximum(inside.sum(axis=(1, 2)), 1)
        cover_out = (up & outside).sum(axis=(1, 2)) / np.maximum(outside.sum(axis=(1, 2)), 1)
    cover_ok = (cover_in >= float(cfg["substring_cover_min"])) & (cover_out <= 1.0 - float(cfg["substring_cover_min"]))
    # flat plateau: spread inside the raised strips small compared with the rise
    Xin = np.where(inside, Xlo, np.nan).reshape(n, -1)
    flat = _iqr(Xin, axis=1) <= np.maximum(float(cfg["open_uniform_iqr"]) * r, float(cfg["open_uniform_floor_k"]))
    hit = F.ok & clean & fit_ok & cover_ok & flat & (mean_raise >= floor)
    # columns part raised: expected share from cell noise alone, plus a margin
    from scipy.stats import norm as _norm

    with np.errstate(invalid="ignore", divide="ignore"):
        p_noise = 2.0 * _norm.sf(0.25 * mean_raise / max(F.sig_cell, 1e-3))
    # the columns on either side of the plateau's edges, where a slanted step shows (the
    # module's outer columns see the ground and the frame and are left alone)
    cr = col_raised.astype(np.int8)
    edge_col = np.zeros_like(col_raised)
    edge_col[:, 1:] |= cr[:, 1:] != cr[:, :-1]
    edge_col[:, :-1] |= cr[:, :-1] != cr[:, 1:]
    partial = _intermediate_columns(F, np.where(edge_col[:, None, :], Xlo, np.nan), mean_raise)
    hit &= ~(partial > p_noise + float(cfg["substring_partial_max"]))
    # and those columns on the plateau (raised or not) within the cell noise: the worst
    # one's mean squared deviation from the plateau model, in cell-noise units (clipped at 5)
    model = np.where(col_raised[:, None, :], mean_raise[:, None, None], 0.0)
    zc = np.clip((Xlo - model) / max(F.sig_cell, 1e-3), -5.0, 5.0)
    col_chi2 = _nanmax(np.where(edge_col, _nanmean(zc * zc, axis=1), np.nan), axis=1)
    col_chi2 = np.nan_to_num(col_chi2, nan=0.0)
    hit &= ~(col_chi2 > float(cfg["substring_column_chi2_max"]))
    hit &= ~_carried_across_edge(F, raised, hit)
    hit &= ~_steps_on_one_line(F, raised, hit, float(cfg["substring_line_tol_m"]))
    conf = _conf(_fit(ratio), _quality(mean_raise, floor), np.clip((cover_in - cover_out), 0, 1))
    # region temperature: median of the raised substrings' measured medians
    temp = _nanmedian(np.where(raised, F.extra["sub_median"], np.nan), axis=1)
    single = Hits("bypassed_substring", hit & (nr == 1), conf, temp)
    multi = Hits("several_bypassed_substrings", hit & (nr >= 2), conf, temp)
    for i in np.flatnonzero(hit):
        ks = np.flatnonzero(raised[i])
        target = single if len(ks) == 1 else multi
        target.region[i] = "substring" if len(ks) == 1 else "substrings"
        target.boxes[i] = [(0.0, 1.0, k / B, (k + 1) / B) for k in ks]
    return single, multi


def _steps_on_one_line(F: Features, raised: np.ndarray, candidates: np.ndarray, tol_m: float,
                       reach_m: float = 40.0) -> np.ndarray:
    """Candidates whose plateau edge lies on one straight line with another's in another row.

    A mosaic seam is a straight step in the image; where it runs along the modules' long
    side it raises part of a module in every row it crosses, and each looks like a
    bypassed substring. Bypass diodes fail one module at a time, so two candidates in
    different table rows whose raised/not-raised boundaries (lines along ``u``) lie within
    ``tol_m`` of one line (and within ``reach_m`` of each other) are taken for a seam, and
    so is a candidate whose step carries on, at least half as high and of the same sign,
    across the same line in the nearest module the line crosses on either side (in
    another row for portrait modules, the next module of the row for landscape ones).
    """
    out = np.zeros(F.n, dtype=bool)
    cand = np.flatnonzero(candidates)
    if cand.size < 1 or "fu" not in F.extra:
        return out
    fu, fv, p0 = F.extra["fu"], F.extra["fv"], F.extra["p0"]
    key = F.extra.get("row_key", np.arange(F.n))
    B = F.nsub
    lines = []   # (module, point, unit direction)
    for i in cand:
        steps = np.flatnonzero(raised[i, 1:] != raised[i, :-1])
        d = fu[i] / max(float(np.hypot(*fu[i])), 1e-9)
        for b in steps:
            lines.append((int(i), p0[i] + 0.5 * fu[i] + (b + 1) / B * fv[i], d))
    # the step carried on into the nearest module the line crosses in another row
    centre, fv_all = F.extra["centre"], F.extra["fv"]
    half_w = 0.5 * np.hypot(fv_all[:, 0], fv_all[:, 1])
    for i, q, d in lines:
        if out[i]:
            continue
        vv_i = float((q - p0[i]) @ fv[i]) / max(float(fv[i] @ fv[i]), 1e-9)
        bi = int(round(vv_i * B))
        step_i = float(F.Rsub[i, bi] - F.Rsub[i, bi - 1])
        w = centre - q
        t = w @ d
        off = np.abs(d[0] * w[:, 1] - d[1] * w[:, 0])
        near = np.flatnonzero((off < half_w) & (np.abs(t) <= reach_m) & (np.arange(F.n) != i) & F.ok)
        for side in (near[t[near] > 0], near[t[near] < 0]):
            if not side.size:
                continue
            m = int(side[np.argmin(np.abs(t[side]))])
            vv = float((q - p0[m]) @ fv[m]) / max(float(fv[m] @ fv[m]), 1e-9)
            b = int(round(vv * B))
            if 1 <= b <= B - 1 and abs(vv - b / B) * np.sqrt(float(fv[m] @ fv[m])) <= tol_m + 0.1:
                step_m = float(F.Rsub[m, b] - F.Rsub[m, b - 1])
                if np.sign(step_m) == np.sign(step_i) and abs(step_m) >= 0.5 * abs(step_i):
                    out[i] = True
    for a in range(len(lines)):
        i, q, d = lines[a]
        for b in range(len(lines)):
            j, qj, dj = lines[b]
            if j == i or key[j] == key[i]:
                continue
            w = qj - q
            along = abs(float(w @ d))
            across = abs(float(d[0] * w[1] - d[1] * w[0]))
            parallel = abs(float(d[0] * dj[1] - d[1] * dj[0])) < 0.1
            if parallel and across <= tol_m and along <= reach_m and _step_between(F, i, j, q, d, tol_m):
                out[i] = out[j] = True
    return out


def _step_between(F: Features, i: int, j: int, q: np.ndarray, d: np.ndarray, tol_m: float) -> bool:
    """True when every module the line crosses between candidates i and j shows the step too.

    A seam raises every module it crosses; two real bypassed substrings that happen to lie
    on one line have producing modules between them.
    """
    fv, p0, centre = F.extra["fv"], F.extra["p0"], F.extra["centre"]
    B = F.nsub
    step_i = abs(float(np.nanmax(F.Rsub[i]) - np.nanmin(F.Rsub[i])))
    t_j = float((centre[j] - q) @ d)
    w = centre - q
    t = w @ d
    off = np.abs(d[0] * w[:, 1] - d[1] * w[:, 0])
    half_w = 0.5 * np.hypot(fv[:, 0], fv[:, 1])
    lo, hi = sorted((0.0, t_j))
    mid = np.flatnonzero((t > lo + 0.3) & (t < hi - 0.3) & (off < half_w) & F.ok)
    mid = mid[(mid != i) & (mid != j)]
    for m in mid:
        vv = float((q - p0[m]) @ fv[m]) / max(float(fv[m] @ fv[m]), 1e-9)
        b = int(round(vv * B))
        if b < 1 or b > B - 1 or abs(vv - b / B) * np.sqrt(float(fv[m] @ fv[m])) > tol_m + 0.1:
            return False
        if abs(float(F.Rsub[m, b] - F.Rsub[m, b - 1])) < 0.5 * step_i:
            return False
    return True


def _carried_across_edge(F: Features, raised: np.ndarray, candidates: np.ndarray) -> np.ndarray:
    """True where a raised edge strip is a step of the image rather than of the module.

    A mosaic seam is a straight step across the ortho: where it splits one module into a
    warm and a cool strip it splits the modules beside it along the step the same way,
    while a conducting bypass diode raises one module's substring only. The modules
    touching this one across its ``u`` edges (the same strips side by side) are checked
    for the same step between the same substrings; within-module differences do not
    suffer from the module-to-module spread. Where no such module exists (single-row
    tables in portrait) or they do not show it, the row is checked: the module beyond the
    raised edge as warm as the raised strip and the one beyond the cool edge as cool as
    the cool strip.
    """
    n, B = raised.shape
    out = np.zeros(n, bool)
    adj = F.extra.get("adjacent")
    if adj is None or n == 0:
        return out
    sm = F.extra["sub_median"]
    centres = F.extra["sub_centres"]           # (n, B, 2)
    edges = F.extra["edge_points"]             # (n, 2, 2): v = 0 and v = 1 edge midpoints
    for i in np.flatnonzero(candidates):
        r0, r1 = bool(raised[i, 0]), bool(raised[i, B - 1])
        if r0 == r1:
            continue                           # both edges raised or neither: no one-sided step
        t_cool = float(_nanmedian(np.where(raised[i], np.nan, sm[i])))
        t_warm = float(_nanmedian(np.where(raised[i], sm[i], np.nan)))
        step = t_warm - t_cool
        for j in (int(j) for j in adj[i, :2] if j >= 0):
            d = float(_nanmedian(np.where(raised[i], sm[j], np.nan)) -
                      _nanmedian(np.where(raised[i], np.nan, sm[j])))
            if np.isfinite(d) and d >= 0.5 * step:
                out[i] = True
        if out[i]:
            continue
        # along the row: the module beyond the raised edge as warm as the raised strip and
        # the one beyond the cool edge as cool as the cool strip (a step through the row)
        wcol, ccol, wside, cside = (2, 3, 0, 1) if r0 else (3, 2, 1, 0)
        jw, jc = int(adj[i, wcol]), int(adj[i, ccol])
        if jw < 0:
            continue
        kw = int(np.argmin(np.linalg.norm(centres[jw] - edges[i, wside], axis=1)))
        warm_ok = np.isfinite(sm[jw, kw]) and (sm[jw, kw] - t_cool) >= 0.7 * step
        if jc >= 0:
            kc = int(np.argmin(np.linalg.norm(centres[jc] - edges[i, cside], axis=1)))
            cool_ok = np.isfinite(sm[jc, kc]) and abs(sm[jc, kc] - t_cool) <= 0.3 * step
        else:
            cool_ok = True
        out[i] = bool(warm_ok and cool_ok)
    return out


def _intermediate_columns(F: Features, Xlo: np.ndarray, raise_k: np.ndarray) -> np.ndarray:
    """Largest share, over the module's cell columns, of cells that break the column's pattern.

    A conducting bypass diode raises whole cell columns (its substring's) to the plateau;
    a step of the image crossing the module at an angle leaves columns part raised: cells
    half-way up, or some cells of the column up and others down.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        x = Xlo / raise_k[:, None, None]
        valid = np.isfinite(x)
        nv = np.maximum(valid.sum(axis=1), 1)
        mid = ((x > 0.25) & (x < 0.75)).sum(axis=1) / nv
        up = (x >= 0.5).sum(axis=1) / nv
        mixed = np.minimum(up, 1.0 - up)
        return np.maximum(mid, mixed).max(axis=1)


def _box_filter_median(X: np.ndarray) -> np.ndarray:
    """Median of each cell's (up to 8) neighbours within the module, NaN-aware."""
    n, A, C = X.shape
    P = np.pad(X, ((0, 0), (1, 1), (1, 1)), constant_values=np.nan)
    stack = [P[:, 1 + di:1 + di + A, 1 + dj:1 + dj + C] for di in (-1, 0, 1) for dj in (-1, 0, 1)
             if (di, dj) != (0, 0)]
    return _nanmedian(np.stack(stack, axis=0), axis=0)


def pattern_hot_cell(F: Features, cfg: Mapping) -> tuple[Hits, Hits]:
    """Single cells markedly warmer than their substring and their neighbouring cells.

    A hot cell (a cell in reverse bias: crack, shading, mismatch) heats the whole cell, so
    its median rises with its p95 (a junction-box spot raises the p95 only). It must stand
    out from its own substring (so a hot cell inside a bypassed substring is still seen)
    and from its neighbouring cells (so a smooth reflection is not a hot cell). A cell next
    to a hot one counts only when at least ``hot_cell_peak_share`` of the hottest around
    it (heat spreading into neighbours does not). With ``hot_cell_merge_touching``,
    touching hot cells form one hot spot (robust to footprints a few centimetres off, at
    the price of calling two touching hot cells one), up to ``hot_cell_merge_max_cells``
    cells; a larger cluster counts as several hot cells.

    Returns
    -------
    (Hits, Hits)
        ``hot_cell`` (one cell) and ``several_hot_cells`` (several); region temperature =
        the hottest hot cell's p95.
    """
    base = F.base_sub[:, F.col_sub][:, None, :]
    X = F.R - base
    X95 = F.R95 - base
    thr = max(float(cfg["hot_cell_min_k"]), float(cfg["noise_z"]) * F.sig_cell)
    loc = X - _box_filter_median(X)
    with np.errstate(invalid="ignore"):
        cand = ((X >= thr) & (X95 >= thr) & (X >= float(cfg["hot_cell_whole_min"]) * X95)
                & (loc >= float(cfg["hot_cell_contrast_min"]) * X))
    Xc = np.where(cand, X, -np.inf)
    peak = ndimage.maximum_filter(Xc, size=(1, 3, 3), mode="constant", cval=-np.inf)
    hot = cand & (X >= float(cfg["hot_cell_peak_share"]) * peak)
    # a hot cell at a short edge cut away by the edge margin (no pixels) shows only as heat
    # bleeding into the p95 of the cell inside it: a spot there, away from any junction box
    A, C = F.n_along, F.n_across
    nan_c = ~np.isfinite(F.R)
    beyond = np.zeros_like(nan_c)
    beyond[:, 1, :] = nan_c[:, 0, :]
    beyond[:, A - 2, :] |= nan_c[:, A - 1, :]
    loc95 = X95 - _box_filter_median(X95)
    with np.errstate(invalid="ignore"):
        edge_spot = (beyond & (X95 >= thr) & (loc95 >= float(cfg["hot_cell_contrast_min"]) * X95)
                     & ~_box_cells(F)[None] & ~cand)
    Xe = np.where(edge_spot, X95, -np.inf)
    peak_e = ndimage.maximum_filter(np.maximum(Xe, np.where(hot, X95, -np.inf)), size=(1, 3, 3),
                                    mode="constant", cval=-np.inf)
    hot |= edge_spot & (X95 >= peak_e)
    hot &= F.ok[:, None, None]
    if bool(cfg["hot_cell_merge_touching"]):
        # touching hot cells as one hot spot: a spot straddling a cell boundary (footprints
        # a few centimetres off) then does not pose as several hot cells
        struct = np.zeros((3, 3, 3), bool)
        struct[1] = True
        labels, _ = ndimage.label(hot, structure=struct)
        count = np.zeros(F.n, np.int64)
        if labels.max() > 0:
            owner = np.array([sl[0].start for sl in ndimage.find_objects(labels)], dtype=np.int64)
            # a spot a few centimetres off the cell grid raises the median of at most two
            # cells (a cell's median needs more than half of it hot): a larger cluster of
            # whole hot cells is several hot cells
            size = np.bincount(labels.ravel())[1:]
            np.add.at(count, owner, np.where(size > int(cfg["hot_cell_merge_max_cells"]), 2, 1))
    else:
        count = hot.sum(axis=(1, 2))
    n = F.n
    xmax = np.where(hot, X95, -np.inf).reshape(n, -1).max(axis=1) if n else np.zeros(0)
    temp = np.where(hot, F.cp, -np.inf).reshape(n, -1).max(axis=1) if n else np.zeros(0)
    temp = np.where(count > 0, temp, np.nan)
    conf = _conf(_quality(xmax, thr))
    single = Hits("hot_cell", count == 1, conf, temp)
    multi = Hits("several_hot_cells", count >= 2, conf, temp)
    for i in np.flatnonzero(count):
        cells = np.argwhere(hot[i])
        target = single if count[i] == 1 else multi
        target.region[i] = "cell" if len(cells) == 1 else "cells"
        target.boxes[i] = [(a / A, (a + 1) / A, c / C, (c + 1) / C) for a, c in cells]
    F.extra["hot_cells"] = hot
    return single, multi


def _box_centres(F: Features) -> list[tuple[float, float]]:
    if F.split_box:
        return [(0.5, (k + 0.5) / F.nsub) for k in range(F.nsub)]
    return [(0.0, 0.5), (1.0, 0.5)]


def _box_block(F: Features, u0: float, v0: float) -> tuple[np.ndarray, np.ndarray]:
    """Cell rows and columns meeting at a junction box centre (u0, v0).

    At a short edge the two outermost rows are taken: the outermost may have lost its
    pixels to the edge margin.
    """
    A, C = F.n_along, F.n_across
    uc = (np.arange(A) + 0.5) / A
    vc = (np.arange(C) + 0.5) / C
    if u0 <= 0.0:
        ii = np.arange(min(2, A))
    elif u0 >= 1.0:
        ii = np.arange(max(A - 2, 0), A)
    else:
        ii = np.flatnonzero(np.abs(uc - u0) <= 1.0 / A + 1e-9)
    jj = np.flatnonzero(np.abs(vc - v0) <= 1.0 / C + 1e-9)
    return ii, jj


def _box_cells(F: Features) -> np.ndarray:
    """(A, C) mask of the cells at any junction box position."""
    mask = np.zeros((F.n_along, F.n_across), bool)
    for (u0, v0) in _box_centres(F):
        ii, jj = _box_block(F, u0, v0)
        mask[np.ix_(ii, jj)] = True
    return mask


def pattern_junction_box(F: Features, cfg: Mapping) -> Hits:
    """A small hot spot where a junction box sits.

    Full-cell modules with one edge box: the centre of a short edge (``u`` near 0 or 1,
    ``v`` = 0.5); half-cut modules with split boxes: the middle line ``u`` = 0.5, at the
    centre of each substring. The spot straddles the cells meeting at that point, raising
    their p95 more than their median (a hot cell raises its whole cell), and no cell around
    them is hotter (heat bleeding from a hot cell next to the box raises the p95 too).

    Returns
    -------
    Hits
        Region ``spot``; region temperature = the highest p95 of the spot's cells.
    """
    A, C, n = F.n_along, F.n_across, F.n
    X = F.R - F.base[:, None, None]
    X95 = F.R95 - F.base[:, None, None]
    thr = max(float(cfg["junction_box_min_k"]), float(cfg["noise_z"]) * F.sig_cell)
    best = np.full(n, -np.inf)
    best_t = np.full(n, np.nan)
    best_box = [None] * n
    best_q = np.zeros(n)
    for (u0, v0) in _box_centres(F):
        ii, jj = _box_block(F, u0, v0)
        sub95 = X95[:, ii][:, :, jj].reshape(n, -1)
        subm = X[:, ii][:, :, jj].reshape(n, -1)
        subt = F.cp[:, ii][:, :, jj].reshape(n, -1)
        if sub95.shape[1] == 0:
            continue
        s = np.where(np.isfinite(sub95), sub95, -np.inf)
        order = np.argsort(-s, axis=1)
        top = np.take_along_axis(s, order[:, :1], axis=1)[:, 0]
        second = np.take_along_axis(s, order[:, 1:2], axis=1)[:, 0] if s.shape[1] > 1 else np.full(n, -np.inf)
        med_top = np.take_along_axis(subm, order[:, :1], axis=1)[:, 0]
        # the rest of the same cell rows: a spot stands out of them, a band along the edge not
        others = np.setdiff1d(np.arange(C), jj)
        rest = _nanmedian(X95[:, ii][:, :, others].reshape(n, -1), axis=1) if others.size else np.zeros(n)
        rest = np.nan_to_num(rest, nan=0.0)
        # the cells around the box: none hotter than the box (else it is heat bleeding
        # from a hot cell next to it)
        ri = np.arange(max(ii.min() - 1, 0), min(ii.max() + 2, A))
        rj = np.arange(max(jj.min() - 1, 0), min(jj.max() + 2, C))
        ring = np.ones((ri.size, rj.size), bool)
        ring[np.ix_(np.isin(ri, ii), np.isin(rj, jj))] = False
        around = X95[:, ri][:, :, rj][:, ring] if ring.any() else np.full((n, 1), -np.inf)
        around = np.where(np.isfinite(around), around, -np.inf).max(axis=1)
        with np.errstate(invalid="ignore"):
            spot = med_top <= float(cfg["junction_box_spot_max"]) * top
            # a box cell cut away by the edge margin (no pixels) cannot be checked
            n_valid = np.isfinite(sub95).sum(axis=1)
            straddle = (second >= float(cfg["junction_box_straddle_min"]) * top) | (n_valid < 2)
            alone = ((top - rest) >= 0.5 * top) & (around < top)
        ok = (top >= thr) & spot & straddle & alone
        better = ok & (top > best)
        best = np.where(better, top, best)
        best_t = np.where(better, _nanmax(subt, axis=1), best_t)
        best_q = np.where(better, _quality(top, thr), best_q)
        hu, hv = 0.5 / A, 0.5 / C
        for i in np.flatnonzero(better):
            best_box[i] = (max(0.0, u0 - hu), min(1.0, u0 + hu), max(0.0, v0 - hv), min(1.0, v0 + hv))
    hit = F.ok & np.isfinite(best) & (best > -np.inf)
    h = Hits("junction_box", hit, _conf(best_q), best_t)
    for i in np.flatnonzero(hit):
        h.region[i] = "spot"
        h.boxes[i] = [best_box[i]]
    return h


def _edge_profile(F: Features, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Median of ``X`` over each line of cells parallel to the lower edge, from the edge up.

    Returns
    -------
    profile : ndarray (n, L)
        Line medians, line 0 at the lower edge (NaN-padded to the longer side).
    length : ndarray of int (n,)
        Lines per module (n_along when the lower edge is u = 0, else n_across).
    """
    n, A, C = F.n, F.n_along, F.n_across
    L = max(A, C)
    prof = np.full((n, L), np.nan)
    lu = F.lower_u
    ok = np.isfinite(X)
    # a line with fewer than half its cells imaged (edge margin) says nothing
    prof[lu, :A] = np.where(ok[lu].mean(axis=2) >= 0.5, _nanmedian(X[lu], axis=2), np.nan)
    prof[~lu, :C] = np.where(ok[~lu].mean(axis=1) >= 0.5, _nanmedian(X[~lu], axis=1), np.nan)
    return prof, np.where(lu, A, C)


def pattern_soiling(F: Features, cfg: Mapping) -> Hits:
    """A warm band along the module's lower edge (dirt collecting where water runs off).

    The lower edge is ``u = 0`` when ``lower_edge == "u"`` and ``v = 0`` when ``"v"``.
    Lines of cells parallel to the lower edge are raised from the edge up to the band's
    depth (at most a third of the module), all along the edge, while the rest of the
    module and its upper edge are not, nor the modules beside it along the edge. The cells'
    p95 is used, since a thin band covers only part of the cells at the edge.

    Returns
    -------
    Hits
        Region ``band``; region temperature = the median over the band's cells of their p95.
    """
    n, A, C = F.n, F.n_along, F.n_across
    X95 = F.R95 - F.base[:, None, None]
    prof, length = _edge_profile(F, X95)
    L = prof.shape[1]
    band = _nanmax(prof[:, :2], axis=1)
    # least band rise: given at the reference conditions and scaled to each module's like
    # any rise (the dirt's heat grows with G / U(v)), never below the camera's noise floor
    thr = np.maximum(float(cfg["soiling_min_norm_k"]) * F.rise / F.extra.get("rise_ref", F.rise),
                     float(cfg["noise_z"]) * F.sig_cell)
    with np.errstate(invalid="ignore"):
        up = prof >= 0.5 * band[:, None]
        # a missing line at the very edge (all cells too thin) does not end the band
        up[:, 0] |= ~np.isfinite(prof[:, 0])
    depth = np.argmin(np.concatenate([up, np.zeros((n, 1), bool)], axis=1), axis=1)
    maxd = np.ceil(length / 3.0).astype(int)
    lines = np.arange(L)[None, :]
    # the line just above the band is its fringe; the rest of the module must stay cool
    rest = np.where((lines >= depth[:, None] + 1) & (lines < length[:, None]), prof, np.nan)
    rest_max = _nanmax(rest, axis=1)
    top = prof[np.arange(n), np.maximum(length - 1, 0)]
    # coverage along the edge: band cells raised by half the band, among valid cells
    ii, jj = np.indices((A, C))
    line_of = np.where(F.lower_u[:, None, None], ii[None], jj[None])          # (n, A, C)
    in_band = line_of < depth[:, None, None]
    valid = np.isfinite(X95)
    edge_len = np.where(F.lower_u, C, A)
    n_band = (in_band & valid).sum(axis=(1, 2))
    # flat along the edge: a band, not a few hot cells
    spread = _iqr(np.where(in_band, X95, np.nan).reshape(n, -1), axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        raised = (X95 >= 0.5 * band[:, None, None]) & in_band & valid
        cover = raised.sum(axis=(1, 2)) / np.maximum(n_band, 1)
        hit = (F.ok & (band >= thr) & (depth >= 1) & (depth <= maxd) & (cover >= float(cfg["soiling_cover_min"]))
               & (n_band >= 0.5 * edge_len) & (spread <= 0.6 * band)
               & (np.nan_to_num(rest_max, nan=0.0) <= float(cfg["soiling_top_max"]) * band)
               & (np.nan_to_num(top, nan=0.0) <= float(cfg["soiling_top_max"]) * band))
    # a band of one module: the modules beside it along the lower edge have none as warm
    # (a mosaic seam's corner or warm ground along the row would)
    adj = F.extra.get("adjacent")
    if adj is not None and hit.any():
        side = np.where(F.lower_u[:, None], adj[:, 2:4], adj[:, 0:2])
        nb_band = np.where(side >= 0, np.nan_to_num(band, nan=0.0)[np.maximum(side, 0)], 0.0)
        with np.errstate(invalid="ignore"):
            hit &= ~(nb_band >= 0.5 * band[:, None]).any(axis=1)
    temp = _nanmedian(np.where(in_band, F.cp, np.nan).reshape(n, -1), axis=1)
    h = Hits("soiling", hit, _conf(_quality(band, thr), np.clip(cover, 0, 1)), temp)
    for i in np.flatnonzero(hit):
        h.region[i] = "band"
        h.boxes[i] = [(0.0, depth[i] / A, 0.0, 1.0)] if F.lower_u[i] else [(0.0, 1.0, 0.0, depth[i] / C)]
    return h


def _groups(modules: pd.DataFrame) -> tuple[np.ndarray, np.ndarray, bool]:
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


def _runs(mask_sorted: np.ndarray) -> list[tuple[int, int]]:
    """(start, stop) of runs of True in a 1-D boolean array."""
    d = np.diff(np.concatenate([[0], mask_sorted.astype(np.int8), [0]]))
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1)))


def _fill_gaps(mask: np.ndarray) -> np.ndarray:
    """Close single-module gaps in a run (one module below the bar between two above)."""
    out = mask.copy()
    if mask.size >= 3:
        out[1:-1] |= mask[:-2] & mask[2:]
    return out


def pattern_open_string(F: Features, cfg: Mapping, groups: np.ndarray, pos: np.ndarray) -> list[list[int]]:
    """Runs of consecutive modules of one string (or table row) all raised like open modules.

    An open string (blown fuse, open connector, tripped input) leaves all its modules
    delivering nothing, each ``eta * G / U`` warmer. Its modules are each other's
    neighbours, so they are judged against a reference that excludes their own string
    or row (``F.extra["d_other"]``, ``F.extra["rsub_other"]``). Candidates are modules
    raised uniformly by at least ``open_string_candidate_z`` robust standard deviations;
    runs of consecutive candidates (single gaps closed) count when their combined
    evidence ``sum(z) / sqrt(n)`` reaches ``open_string_run_z`` and their median rise fits
    the open-module rise.

    Parameters
    ----------
    F : Features
    cfg : mapping
    groups, pos : ndarray
        Group code (string, else table row; -1 none) and position along it.

    Returns
    -------
    list of list of int
        Module indices of each run, in string order (at least ``open_string_min_modules``).
    """
    d_o = F.extra["d_other"]
    rsub_o = F.extra["rsub_other"]
    sig = max(F.extra["sig_other"], 0.05)
    r = F.rise
    z = d_o / sig
    lo = _nanmin(rsub_o, axis=1)
    spread = _iqr((F.R - F.base[:, None, None]).reshape(F.n, -1), axis=1)
    # uniformity also against the shape of all neighbours, suspects included (the first
    # pass): the modules of an open string share its raise and any image artefact that
    # crosses the row, such as a mosaic seam's edge, which neighbours outside it do not
    if "spread_all" in F.extra:
        spread = np.fmin(spread, F.extra["spread_all"])
    uniform = spread <= np.maximum(float(cfg["open_uniform_iqr"]) * r, float(cfg["open_uniform_floor_k"]))
    with np.errstate(invalid="ignore"):
        cand = (F.ok & (z >= float(cfg["open_string_candidate_z"])) & uniform
                & (lo >= 0.5 * float(cfg["substring_raise_min"]) * r)
                & (d_o <= float(cfg["open_ratio_max"]) * r))
    out = []
    min_len = int(cfg["open_string_min_modules"])
    for g in np.unique(groups[cand & (groups >= 0)]):
        idx = np.flatnonzero(groups == g)
        idx = idx[np.argsort(pos[idx], kind="stable")]
        c = _fill_gaps(cand[idx]) & F.ok[idx]
        for a, b in _runs(c):
            run = idx[a:b]
            if b - a < min_len:
                continue
            zc = float(np.nansum(z[run]) / np.sqrt(len(run)))
            ratio = float(np.nanmedian(d_o[run]) / np.nanmedian(r[run]))
            if (zc >= float(cfg["open_string_run_z"]) and ratio >= float(cfg["open_string_ratio_min"])
                    and not _raise_carries_on(F, run) and _stands_out_of_its_row(F, run, float(cfg["open_string_row_radius_m"]),
                                                               float(cfg["open_string_row_share"]))):
                # an established run takes in end modules of its string that are raised,
                # if less clearly (an open string is normally the whole string)
                lo_end, hi_end = a, b
                end_z = float(cfg["open_string_end_z"])
                while lo_end > 0 and F.ok[idx[lo_end - 1]] and z[idx[lo_end - 1]] >= end_z:
                    lo_end -= 1
                while hi_end < len(idx) and F.ok[idx[hi_end]] and z[idx[hi_end]] >= end_z:
                    hi_end += 1
                run = idx[lo_end:hi_end]
                if F.extra.get("is_string", False) and not _string_opens_whole(F, cfg, idx, run):
                    continue
                if not _raised_over_other_row_throughout(F, cfg, run):
                    continue
                if not _stops_at_its_ends(F, cfg, run):
                    continue
                out.append([int(i) for i in run])
    return out


def _raised_over_other_row_throughout(F: Features, cfg: Mapping, run) -> bool:
    """False when part of the run is not raised over the modules beside it in the other row.

    An open string carries no current in any of its modules, so each one runs about the
    open-module rise above the healthy module beside it in the table's other row. A mosaic
    seam whose edge runs between two rows of a table and ends part-way along them raises
    one row over the other only where the seam is. The share of the run's modules less
    than ``open_string_cross_min`` of the rise above their other-row neighbour may be at
    most ``open_string_cross_fail_max`` (defects are sparse: a defective neighbour is rare).
    The differences are taken relative to how the two rows compare beside the run (the
    median difference of the run's own table row outside it, at least three modules; zero
    when fewer): a seam or a shadow edge over the whole of one row shifts both alike.
    """
    cross = F.extra.get("cross_row")
    if cross is None:
        return True
    run = np.asarray(run)
    j = cross[run]
    members = set(run.tolist())
    usable = np.array([jj >= 0 and int(jj) not in members for jj in j], bool)
    if usable.any():
        jj = np.maximum(j, 0)
        usable &= F.ok[jj] & np.isfinite(F.t_median[jj])
    if usable.sum() < 3:
        return True
    r = run[usable]
    diff = F.t_median[r] - F.t_median[cross[r]]
    row_key = F.extra.get("row_key")
    if row_key is not None and row_key[run[0]] >= 0:
        beside = np.flatnonzero(row_key == row_key[run[0]])
        beside = beside[~np.isin(beside, run) & (cross[beside] >= 0)]
        beside = beside[~np.isin(cross[beside], run)]
        beside = beside[F.ok[beside] & F.ok[cross[beside]]]
        d_beside = F.t_median[beside] - F.t_median[cross[beside]]
        d_beside = d_beside[np.isfinite(d_beside)]
        if d_beside.size >= 3:
            diff = diff - float(np.median(d_beside))
    with np.errstate(invalid="ignore"):
        low = diff < float(cfg["open_string_cross_min"]) * F.rise[r]
    return float(low.mean()) <= float(cfg["open_string_cross_fail_max"])


def _stops_at_its_ends(F: Features, cfg: Mapping, run) -> bool:
    """False when the raise goes on into the module just past an end of the run.

    An open string's raise stops where the string stops: the next module along the row,
    of another string, carries current and runs no warmer than its neighbours. A mosaic
    seam does not care where strings end. The module past each end (same table row) may be
    raised by at most ``open_string_beyond_max`` of the run's median raise: the mean of its
    raise over the module beside it in the other row and over modules outside its string
    (the latter alone where there is no other row).
    """
    along = F.extra.get("along_row")
    cross = F.extra.get("cross_row")
    if along is None:
        return True
    run = np.asarray(run)
    members = set(run.tolist())
    t = F.t_median
    has = cross[run] >= 0 if cross is not None else np.zeros(len(run), bool)
    raise_run = (float(np.nanmedian(t[run[has]] - t[cross[run[has]]])) if has.sum() >= max(1, len(run) // 2)
                 else float(np.nanmedian(F.extra["d_other"][run])))
    if not np.isfinite(raise_run) or raise_run <= 0:
        return True
    limit = float(cfg["open_string_beyond_max"]) * raise_run
    for end in (int(run[0]), int(run[-1])):
        for j in along[end]:
            j = int(j)
            if j < 0 or j in members or not F.ok[j]:
                continue
            beyond = float(F.extra["d_other"][j])
            if cross is not None and cross[j] >= 0 and int(cross[j]) not in members and F.ok[cross[j]]:
                beyond = float(np.nanmean([t[j] - t[cross[j]], beyond]))
            if np.isfinite(beyond) and beyond > limit:
                return False
    return True


def _string_opens_whole(F: Features, cfg: Mapping, members, run) -> bool:
    """False when the string's modules outside the run are clearly not open.

    An open string carries no current in any of its modules, so all of them run
    ``eta * G / U`` warmer; a run that covers only part of a string while at least two
    other classified modules of it sit at a fraction ``open_string_rest_max`` of the rise
    or less (median, against modules outside the string) is something else (a cloud
    shadow or a seam raising part of a row over the neighbouring rows).
    """
    rest = np.setdiff1d(np.asarray(members), np.asarray(run))
    rest = rest[F.ok[rest] & np.isfinite(F.extra["d_other"][rest])]
    if rest.size < 2:
        return True
    level = float(np.median(F.extra["d_other"][rest]))
    return level >= float(cfg["open_string_rest_max"]) * float(np.nanmedian(F.rise[run]))


def _stands_out_of_its_row(F: Features, run, radius_m: float = 5.0, share: float = 0.35) -> bool:
    """False when the run is not warmer than the rest of its own table row nearby.

    The out-of-string reference comes from other rows, which under an irradiance gradient
    (a cloud shadow's edge) can sit lower; the modules of the run's own row outside it,
    within ``radius_m`` [m] of it, share its irradiance (the nearest ones best; farther
    along, a mosaic seam crossing the row would decide). The run's median must exceed
    theirs by ``share`` of its raise over the other rows. Runs that fill their row are
    not checked.
    """
    key = F.extra.get("row_key")
    if key is None:
        return True
    run = np.asarray(run)
    k = key[run[0]]
    if k < 0:
        return True
    xy = F.extra["centre"]
    mates = np.flatnonzero((key == k) & F.ok)
    mates = mates[~np.isin(mates, run)]
    if mates.size:
        d = np.min(np.linalg.norm(xy[mates][:, None, :] - xy[run][None, :, :], axis=2), axis=1)
        mates = mates[d <= radius_m]
    if mates.size < 3:
        return True
    own = float(np.nanmedian(F.t_median[run]) - np.nanmedian(F.t_median[mates]))
    return own >= share * float(np.nanmedian(F.extra["d_other"][run]))


def _raise_carries_on(F: Features, run) -> bool:
    """True when a run's raise over the other row of its table carries on past its ends.

    An open string stops where the string stops; a mosaic seam running along a table row
    raises the modules beyond the run as well.
    """
    cross = F.extra.get("cross_row")
    along = F.extra.get("along_row")
    if cross is None or along is None:
        return False
    t = F.t_median
    run = np.asarray(run)
    has = cross[run] >= 0
    if has.sum() < max(1, len(run) // 2):
        return False
    d_run = float(np.nanmedian(t[run[has]] - t[cross[run[has]]]))
    if not np.isfinite(d_run) or d_run <= 0.3 * float(np.nanmedian(F.rise[run])):
        return False
    members = set(run.tolist())
    for start in {int(j) for i in run for j in along[i] if j >= 0 and int(j) not in members}:
        # walk up to three modules along the row away from the run; compare their mean
        # offset over the other row with the run's (one module alone is too noisy)
        seen, line, cur = set(members), [], start
        while cur >= 0 and len(line) < 3 and cur not in seen:
            seen.add(cur)
            line.append(cur)
            nxt = [int(j) for j in along[cur] if j >= 0 and int(j) not in seen]
            cur = nxt[0] if nxt else -1
        diffs = [t[b] - t[cross[b]] for b in line if cross[b] >= 0]
        diffs = [x for x in diffs if np.isfinite(x)]
        if len(diffs) >= 2 and float(np.mean(diffs)) >= 0.6 * d_run:
            return True
    return False


def _trimmed_mean(x: np.ndarray, cut: float = 0.1) -> np.ndarray:
    """Mean along the last axis without the lowest and highest ``cut`` share, ignoring NaN."""
    lo = _nanquantile(x, cut, axis=-1)[..., None]
    hi = _nanquantile(x, 1.0 - cut, axis=-1)[..., None]
    keep = (x >= lo) & (x <= hi)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(keep, x, 0.0).sum(axis=-1) / np.maximum(keep.sum(axis=-1), 1) + \
            np.where(keep.sum(axis=-1) > 0, 0.0, np.nan)


def pid_ring_contrast(F: Features) -> np.ndarray:
    """How much warmer a module's edge cells run than its interior cells [K].

    The median over the four edges (lines of cells along ``u = 0``, ``u = 1``, ``v = 0``,
    ``v = 1``) of the edge's trimmed mean residual minus the interior's.

    The 10 % trimming keeps a single hot cell from posing as an edge-weighted pattern. The
    residual is taken against modules outside the string (``F.extra["R_other"]``) when
    available: PID modules sit side by side, and their neighbours' shared shape would
    carry part of their own pattern.
    """
    n, A, C = F.n, F.n_along, F.n_across
    ii, jj = np.indices((A, C))
    ring = ((ii == 0) | (ii == A - 1) | (jj == 0) | (jj == C - 1)).ravel()
    flat = F.extra.get("R_other", F.R).reshape(n, -1)
    core = _trimmed_mean(flat[:, ~ring])
    # each of the four edges on its own, then the median of the four: PID warms all edges,
    # a seam or warm ground along a row one of them
    sides = [(ii == 0), (ii == A - 1), (jj == 0), (jj == C - 1)]
    per_side = np.stack([_trimmed_mean(flat[:, m.ravel()]) - core for m in sides], axis=1)
    return _nanmedian(per_side, axis=1)


def pattern_pid(F: Features, cfg: Mapping, groups: np.ndarray, pos: np.ndarray,
                is_string: bool, exclude: np.ndarray) -> list[list[int]]:
    """Potential-induced degradation along a string.

    PID shunts cells of the modules nearest the string's negative end (``string_index``
    1) most, fading along the string, in a patchy pattern strongest at the cells next to
    the grounded frame. The telling sign is the contrast of a module's edge ring of cells
    over its interior (:func:`pid_ring_contrast`), insensitive to the module-to-module
    spread, in robust standard deviations of healthy modules' contrast. A string
    qualifies when its module at the negative end reaches ``pid_seed_z`` (or reaches
    ``pid_extend_z`` with the second module reaching ``pid_seed_z``) and is warmer than its
    surroundings; the affected run extends from the negative end while the
    contrast keeps above ``pid_extend_z`` on balance (the end maximises ``sum(z -
    pid_extend_z)``, so a single weaker module between stronger ones does not end it),
    over at least ``pid_min_modules`` and at most the first ``pid_max_position`` of the
    string, the modules after the first reaching ``pid_rest_z`` by themselves (the best
    prefix of them, ``sum(z) / sqrt(m)``), the best run from the negative end having combined evidence
    ``sum(z) / sqrt(n)`` of at least ``pid_run_z``, and the run's median excess over
    modules outside its string, in robust spreads of healthy modules, at least
    ``pid_warm_min_z`` (PID takes power away, so the modules run warmer, not clearly
    cooler).

    Returns
    -------
    list of list of int
        The affected modules of each PID string (needs ``string_id``/``string_index``).
    """
    if not is_string:
        return []
    contrast = pid_ring_contrast(F)
    healthy = F.ok & ~exclude & np.isfinite(contrast)
    if healthy.sum() < 5:
        return []
    c0 = float(np.median(contrast[healthy]))
    sig = max(_robust_sigma(contrast[healthy]), 0.02)
    z = (contrast - c0) / sig
    F.extra["pid_z"] = z
    d_o = F.extra["d_other"]
    # extension: edge-ring contrast and the module's excess over modules outside its string
    # together (both in robust standard deviations of healthy modules)
    z_o = d_o / max(float(F.extra.get("sig_other", F.sig_mod)), 0.05)
    w = float(cfg["pid_excess_weight"])
    z_ext = (z + w * np.clip(z_o, -3.0, 3.0)) / np.sqrt(1.0 + w * w)
    out = []
    for g in np.unique(groups[groups >= 0]):
        idx = np.flatnonzero(groups == g)
        idx = idx[np.argsort(pos[idx], kind="stable")]
        if len(idx) < 3:
            continue
        first = idx[0]
        if exclude[first] or not F.ok[first]:
            continue
        # the seed: the module at the negative end shows the pattern, or shows some of it
        # (the extension bar) with the next module showing it fully; a PID pattern is
        # patchy, and the most affected module need not be the most edge-weighted one
        z_seed = float(cfg["pid_seed_z"])
        second = idx[1]
        seeded = z[first] >= z_seed or (
            z[first] >= float(cfg["pid_extend_z"]) and not exclude[second] and bool(F.ok[second])
            and z[second] >= z_seed)
        if not seeded:
            continue
        # the best prefix from the negative end: PID is strongest there and fades, so the
        # evidence of the first m modules, sum(z) / sqrt(m), peaks where PID stops showing
        max_len = max(int(np.floor(float(cfg["pid_max_position"]) * len(idx))), 1)
        # no single module after the first carries the string's evidence by itself: its
        # contrast counts for at most pid_z_cap there (a bypassed strip or a seam edge along
        # one module's frame can give it a huge edge contrast)
        cap = float(cfg["pid_z_cap"])
        zz = np.where(exclude[idx] | ~F.ok[idx], np.nan, z_ext[idx])[:max_len]
        zr = np.where(exclude[idx] | ~F.ok[idx], np.nan, np.minimum(z[idx], cap))[:max_len]
        if np.isnan(zz).any():
            zr = zr[: int(np.argmax(np.isnan(zz)))]
            zz = zz[: int(np.argmax(np.isnan(zz)))]
        m_min = int(cfg["pid_min_modules"])
        if len(zz) < max(m_min, 2):
            continue
        # the modules after the first carry the cell pattern on by themselves (best prefix
        # of their edge-ring contrast, sum(z) / sqrt(m)): one warm-edged module at a
        # string's end is not PID, nor a string that a reflection or a seam warms as a
        # whole; but one weaker module right after the first does not undo a string that
        # shows the pattern further on
        rest = np.cumsum(zr[1:]) / np.sqrt(np.arange(1, len(zr)))
        if np.max(rest[max(m_min - 2, 0):]) < float(cfg["pid_rest_z"]):
            continue
        score = np.cumsum(zz) / np.sqrt(np.arange(1, len(zz) + 1))
        if np.max(score[m_min - 1:]) < float(cfg["pid_run_z"]):
            continue
        # where the pattern stops: the end that maximises sum(z - pid_extend_z) from the
        # negative end (a change point: modules above the bar add, below it take away, so a
        # single weak module between stronger ones does not end the run)
        gain = np.cumsum(zz - float(cfg["pid_extend_z"]))
        k = int(np.argmax(gain[m_min - 1:])) + m_min
        # PID takes power away, so the affected modules run warmer than modules outside
        # their string (a seam or a shadow edge crossing the string's end need not)
        if not float(np.nanmedian(z_o[idx[:k]])) >= float(cfg["pid_warm_min_z"]):
            continue
        run = [int(i) for i in idx[:k]]
        out.append(run)
    return out


# --------------------------------------------------------------------------------------
# orchestration
# --------------------------------------------------------------------------------------

def _detect(F: Features, cfg: Mapping, final: bool = True) -> list[Hits]:
    hits = [pattern_open_module(F, cfg)]
    hits += list(pattern_bypassed_substring(F, cfg, final=final))
    hits += list(pattern_hot_cell(F, cfg))
    hits.append(pattern_junction_box(F, cfg))
    hits.append(pattern_soiling(F, cfg))
    return hits


def _geometry(modules: pd.DataFrame, nsub: int) -> dict:
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
    from pvscan.diagnose.thermal import _row_keys

    return {"adjacent": adj, "sub_centres": centres, "edge_points": edges, "cross_row": cross,
            "along_row": along, "row_key": _row_keys(modules),
            "centre": p0 + 0.5 * (fu + fv), "p0": p0, "fu": fu, "fv": fv}


def _stage(modules, stats, conditions, module_spec, cfg, cfg_ref, ok, healthy, groups, pos, is_string,
           final=True, spread_all=None):
    t_med = stats.table["t_median_c"].to_numpy(dtype=float)
    rr = local_reference(modules, t_med, healthy, cfg_ref, return_details=True)
    # a reference that excludes the module's own string (or row): a whole string raised
    # together would otherwise be its own reference
    ro = local_reference(modules, t_med, healthy, cfg_ref, exclude_group=groups, return_details=True)
    ref_o = np.where(np.isfinite(ro.reference_c), ro.reference_c, rr.reference_c)
    F = _features(modules, stats, conditions, module_spec, rr.reference_c, rr.neighbours, ok, cfg, cfg_ref,
                  ref_irr=0.5 * (rr.reference_c + ref_o))
    F.extra["sub_median"] = np.asarray(stats.sub_median, dtype=np.float64)
    F.extra["suspect"] = rr.suspect
    if spread_all is not None:
        F.extra["spread_all"] = spread_all
    F.extra.update(_geometry(modules, F.nsub))
    hits = _detect(F, cfg, final=final)
    # an open module is raised against both neighbourhoods: its row, and modules outside its
    # string (a reference biased by a shadow edge along the row is not both)
    om = hits[0]
    d_o = t_med - ref_o
    with np.errstate(invalid="ignore"):
        om.hit &= d_o >= float(cfg["open_other_share"]) * float(cfg["module_z"]) * F.sig_mod
    d_other = t_med - ref_o
    rsub_o = F.Rsub + (F.ref - ref_o)[:, None]
    # the cell pattern against modules outside the string too: a string-long pattern (PID)
    # would otherwise be partly taken for the shape its neighbours share
    shape_o = np.nan_to_num(_neighbour_median(F.cm - t_med[:, None, None], ro.neighbours), nan=0.0)
    F.extra["R_other"] = F.cm - ref_o[:, None, None] - shape_o
    sig_o = _robust_sigma(d_other[healthy & F.ok]) if (healthy & F.ok).sum() >= 3 else F.sig_mod
    F.extra["is_string"] = bool(is_string)
    F.extra.update(ref_other=ref_o, d_other=d_other, rsub_other=rsub_o,
                   sig_other=sig_o if np.isfinite(sig_o) else F.sig_mod)
    runs = pattern_open_string(F, cfg, groups, pos)
    in_run = np.zeros(F.n, bool)
    for run in runs:
        in_run[run] = True
    F.extra.update(open_runs=runs, in_run=in_run)
    return F, hits


def classify(modules, stats, conditions, module_spec, settings=None, confidence_factor: float = 1.0,
             progress=None):
    """Classify every module: local reference, delta T, defect patterns and severity.

    Parameters
    ----------
    modules : GeoDataFrame
        Modules (``module_id``, ``table_id``, ``string_id``, ``string_index``, ``table_row``,
        ``table_col``, module-local frame, ``lower_edge``), projected CRS [m].
    stats : ZonalStats-like
        True glass temperatures [degC]: ``table`` (``t_median_c``, ``t_max_c``,
        ``valid_fraction`` ...), ``cell_median``, ``cell_p95``, ``cell_count``
        (n, n_along, n_across), ``sub_median``, ``sub_p95`` (n, bypass_diodes).
    conditions : DataFrame
        Aligned with the modules: ``poa_global`` [W/m2], ``temp_air`` [degC],
        ``wind_speed`` [m/s].
    module_spec : ModuleSpec-like
        ``efficiency``, ``bypass_diodes``, ``junction_box`` ("edge" | "split"), ...
    settings : Pipeline, optional
        Pipeline settings (sections ``reference``, ``classify``, ``severity``); default
        ``pipelines/post_flight.toml``.
    confidence_factor : float
        0..1, multiplies every confidence (acquisition limits not met lower it).
    progress : callable, optional
        ``progress(stage, done, total)``.

    Returns
    -------
    anomalies : DataFrame
        One row per anomaly, columns :data:`ANOMALY_COLUMNS`.
    module_table : DataFrame
        Aligned with the modules: ``reference_c`` [degC], ``delta_t_k``, ``delta_t_norm_k``
        [K], ``defect`` (None when healthy), ``classified`` (False when too little of the
        module was imaged to judge it), ``confidence``.
    """
    if settings is None:
        from pvscan.io.settings import load_pipeline

        settings = load_pipeline()
    cfg = _section(settings, "classify", _CLASSIFY_DEFAULTS)
    cfg_ref = _section(settings, "reference", _REFERENCE_DEFAULTS)
    cfg_sev = _section(settings, "severity", _SEVERITY_DEFAULTS)
    cf = float(np.clip(confidence_factor if confidence_factor is not None else 1.0, 0.0, 1.0))
    n = len(modules)
    if progress:
        progress("classify", 0, 3)
    table = stats.table
    vf = table["valid_fraction"].to_numpy(dtype=float) if "valid_fraction" in table else np.ones(n)
    t_med = table["t_median_c"].to_numpy(dtype=float)
    ok = np.isfinite(t_med) & (np.nan_to_num(vf, nan=0.0) >= float(cfg["min_valid_fraction"]))
    if (~ok).any():
        logger.info("%d of %d modules not classified (valid fraction below %.2f)",
                    int((~ok).sum()), n, float(cfg["min_valid_fraction"]))
    if n == 0:
        anomalies = assign_severity(pd.DataFrame(columns=ANOMALY_COLUMNS[:-2]), cfg_sev)[ANOMALY_COLUMNS]
        module_table = pd.DataFrame({"reference_c": [], "delta_t_k": [], "delta_t_norm_k": [],
                                     "defect": pd.Series([], dtype=object), "classified": pd.Series([], dtype=bool),
                                     "confidence": []}, index=modules.index)
        return anomalies, module_table
    groups, pos, is_string = _groups(modules)

    # pass 1: suspects
    F1, hits1 = _stage(modules, stats, conditions, module_spec, cfg, cfg_ref, ok, ok, groups, pos, is_string,
                       final=False)
    suspect = F1.extra["suspect"] | F1.extra["in_run"]
    for h in hits1:
        suspect |= h.hit
    if progress:
        progress("classify", 1, 3)
    # pass 2: final, suspects excluded from every reference
    F, hits = _stage(modules, stats, conditions, module_spec, cfg, cfg_ref, ok, ok & ~suspect,
                     groups, pos, is_string,
                     spread_all=_iqr((F1.R - F1.base[:, None, None]).reshape(F1.n, -1), axis=1))
    if progress:
        progress("classify", 2, 3)
    by = {h.defect: h for h in hits}
    open_own = by["open_module"].hit
    runs = F.extra["open_runs"]
    in_run = F.extra["in_run"]
    any_area = in_run | open_own | by["bypassed_substring"].hit | by["several_bypassed_substrings"].hit
    pid_runs = pattern_pid(F, cfg, groups, pos, is_string, any_area)

    g_cond = conditions["poa_global"].to_numpy(dtype=float) if "poa_global" in conditions else np.full(n, np.nan)
    w_cond = conditions["wind_speed"].to_numpy(dtype=float) if "wind_speed" in conditions else np.full(n, np.nan)
    norm = lambda dt, i: normalise_delta_t(dt, g_cond[i], w_cond[i], g_ref=float(cfg_ref.get("g_ref_w_m2", 1000.0)),  # noqa: E731
                                           wind_ref=float(cfg_ref.get("wind_ref_m_s", 1.0)),
                                           u0=float(cfg_ref["u0"]), u1=float(cfg_ref["u1"]))
    mod_id = modules["module_id"].astype(str).to_numpy() if "module_id" in modules else np.arange(n).astype(str)
    t_max = F.t_max
    rows = []
    precedence = list(cfg["precedence"])
    defect_of = np.full(n, None, dtype=object)
    conf_of = np.full(n, np.nan)

    # string-level anomalies first
    for run in runs:
        i0 = run[0]
        ref_o = F.extra["ref_other"][run]
        dts = t_med[run] - ref_o
        dt = float(np.median(dts))
        dtn = float(np.median(norm(dts, np.asarray(run))))
        # confidence from the run's combined evidence and how well its rise fits eta*G/U
        z_run = F.extra["d_other"][run] / max(F.extra["sig_other"], 0.05)
        zc = float(np.nansum(z_run) / np.sqrt(len(run)))
        ratio = float(np.nanmedian(dts) / np.nanmedian(F.rise[run]))
        conf = float(_conf(_quality(zc, float(cfg["open_string_run_z"])), _fit(np.array(ratio))))
        rows.append(dict(module_index=i0, module_id=mod_id[i0], module_indices=list(run),
                         module_ids=[mod_id[i] for i in run], defect="open_string", other_defects=[],
                         region="modules", region_uv=[(0.0, 1.0, 0.0, 1.0)], delta_t_k=dt,
                         delta_t_norm_k=dtn, t_max_c=float(np.nanmax(t_max[run])), confidence=cf * conf))
        defect_of[run] = "open_string"
        conf_of[run] = cf * conf
    pid_hits = np.zeros(n, bool)
    pid_conf = np.zeros(n)
    for run in pid_runs:
        pid_hits[run] = True
        pid_conf[run] = _conf(_quality(F.extra["pid_z"][run], float(cfg["pid_extend_z"])))
    pid = Hits("pid", pid_hits, pid_conf, t_med.copy())
    for i in np.flatnonzero(pid_hits):
        pid.region[i] = "module"
        pid.boxes[i] = [(0.0, 1.0, 0.0, 1.0)]
    by["pid"] = pid

    for i in range(n):
        if in_run[i] or not F.ok[i]:
            continue
        present = [d for d in precedence if d in by and by[d].hit[i]]
        if not present:
            continue
        d = present[0]
        h = by[d]
        temp = float(h.temp_c[i])
        ref_i = F.extra["ref_other"][i] if d == "pid" else F.ref[i]
        dt = temp - ref_i
        conf = cf * float(h.confidence[i])
        rows.append(dict(module_index=i, module_id=mod_id[i], module_indices=[i], module_ids=[mod_id[i]],
                         defect=d, other_defects=present[1:], region=h.region.get(i, "module"),
                         region_uv=h.boxes.get(i, [(0.0, 1.0, 0.0, 1.0)]), delta_t_k=dt,
                         delta_t_norm_k=float(norm(dt, i)), t_max_c=float(t_max[i]), confidence=conf))
        defect_of[i] = d
        conf_of[i] = conf

    anomalies = pd.DataFrame(rows, columns=[c for c in ANOMALY_COLUMNS if c not in ("severity", "iec_class")])
    anomalies = assign_severity(anomalies, cfg_sev)
    anomalies = anomalies[ANOMALY_COLUMNS].reset_index(drop=True)
    if len(anomalies):
        anomalies["module_index"] = anomalies["module_index"].astype(int)

    dT = t_med - F.ref
    module_table = pd.DataFrame({
        "reference_c": F.ref,
        "delta_t_k": dT,
        "delta_t_norm_k": norm(dT, np.arange(n)),
        "defect": defect_of,
        "classified": F.ok,
        "confidence": conf_of,
    }, index=modules.index)
    if progress:
        progress("classify", 3, 3)
    logger.info("classified %d modules: %d anomalies", int(F.ok.sum()), len(anomalies))
    return anomalies, module_table


def assign_severity(anomalies: pd.DataFrame, settings=None) -> pd.DataFrame:
    """Set ``severity`` (safety | repair | monitor) and ``iec_class`` of each anomaly.

    * ``safety``: temperatures that threaten the encapsulant, backsheet, connectors or the
      junction box, or a fire: ``t_max_c >= safety_t_max_c`` for any pattern; a spot
      pattern with ``delta_t_norm_k >= safety_delta_t_norm_k``; a junction box with
      ``delta_t_norm_k >= safety_junction_box_delta_t_norm_k``;
    * ``monitor``: patterns in ``monitor_defects`` (soiling: cleaning, not repair) and hot
      cells below ``repair_hot_cell_delta_t_norm_k``;
    * ``repair``: everything else (lost output: open strings and modules, bypassed
      substrings, PID, hot cells, junction boxes).

    ``iec_class`` follows the classes of abnormality of IEC TS 62446-3 (from memory:
    CoA 1 no abnormality, CoA 2 thermal abnormality, CoA 3 safety-relevant thermal
    abnormality); anomalies are CoA 2 or CoA 3.

    Parameters
    ----------
    anomalies : DataFrame
        With ``defect``, ``delta_t_norm_k`` [K], ``t_max_c`` [degC].
    settings : Pipeline or mapping, optional
        The ``[severity]`` section.

    Returns
    -------
    DataFrame
        A copy with ``severity`` and ``iec_class``.
    """
    cfg = _section(settings, "severity", _SEVERITY_DEFAULTS)
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
        monitor = np.isin(d, list(cfg["monitor_defects"])) | (hot & (dtn < float(cfg["repair_hot_cell_delta_t_norm_k"])))
    sev = np.where(safety, "safety", np.where(monitor, "monitor", "repair"))
    out["severity"] = sev.astype(object)
    out["iec_class"] = np.where(safety, str(cfg["iec_class_safety"]), str(cfg["iec_class_other"])).astype(object)
    return out
