"""Module thermal model, Faiman normalisation and the local healthy reference.

Three things live here:

* the Faiman heat-loss coefficient ``U(v) = u0 + u1 * v`` and the normalisation of a
  temperature difference to reference conditions (1000 W/m2, 1 m/s wind);
* the *open-module rise* ``eta * G / U(v)``: a module (or substring) that delivers no
  electrical power turns the share ``eta`` of the irradiance it would have delivered into
  heat, so it runs warmer than its producing neighbours by about that much. This is the
  physical yardstick the classifier compares raised areas against;
* :func:`local_reference`: each module's reference temperature, the median of its healthy
  neighbours (same table row first, else a local window), computed twice so that
  defective modules do not pull their neighbours' reference up.

References
----------
.. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
.. [2] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Outdoor infrared thermography of photovoltaic
   modules and plants.
"""
from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

__all__ = [
    "faiman_u",
    "normalise_delta_t",
    "open_module_rise",
    "local_reference",
    "module_centres",
    "ReferenceResult",
    "reference_neighbours",
]

logger = logging.getLogger(__name__)

#: Faiman coefficients fitted in [1] (also pvlib's defaults) [W/(m2 K)], [W s/(m3 K)].
U0_FAIMAN = 25.0
U1_FAIMAN = 6.84


def faiman_u(wind_speed, u0: float = U0_FAIMAN, u1: float = U1_FAIMAN):
    """Faiman combined heat-loss coefficient.

    Parameters
    ----------
    wind_speed : float or array-like
        Wind speed [m/s]. Negative values are treated as calm (0 m/s).
    u0 : float
        Constant heat-loss coefficient [W/(m2 K)].
    u1 : float
        Wind-dependent heat-loss coefficient [W s/(m3 K)].

    Returns
    -------
    float or ndarray
        ``U = u0 + u1 * wind_speed`` [W/(m2 K)], such that the module runs
        ``poa_global / U`` above the air temperature.

    References
    ----------
    .. [1] D. Faiman, Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    ws = np.asarray(wind_speed, dtype=float)
    u = u0 + u1 * np.clip(ws, 0.0, None)
    return float(u) if u.ndim == 0 else u


def normalise_delta_t(delta_t_k, poa_global, wind_speed, *, g_ref: float = 1000.0,
                      wind_ref: float = 1.0, u0: float = U0_FAIMAN, u1: float = U1_FAIMAN):
    """Scale a temperature difference to reference irradiance and wind (Faiman).

    A temperature difference driven by absorbed power grows in proportion to irradiance
    and shrinks with the heat-loss coefficient, so

    ``delta_t_norm = delta_t * (g_ref / G) * (U(v) / U(wind_ref))``.

    Parameters
    ----------
    delta_t_k : float or array-like
        Measured temperature difference [K].
    poa_global : float or array-like
        Plane-of-array irradiance when the module was imaged [W/m2].
    wind_speed : float or array-like
        Wind speed when the module was imaged [m/s].
    g_ref : float
        Reference irradiance [W/m2].
    wind_ref : float
        Reference wind speed [m/s].
    u0, u1 : float
        Faiman coefficients [W/(m2 K)], [W s/(m3 K)].

    Returns
    -------
    float or ndarray
        Normalised temperature difference [K]; NaN where ``poa_global <= 0`` or is NaN.

    References
    ----------
    .. [1] D. Faiman, Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    dt = np.asarray(delta_t_k, dtype=float)
    g = np.asarray(poa_global, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        scale = np.where(g > 0, g_ref / np.where(g > 0, g, 1.0), np.nan)
        out = dt * scale * (faiman_u(wind_speed, u0, u1) / faiman_u(wind_ref, u0, u1))
    out = np.asarray(out, dtype=float)
    return float(out) if out.ndim == 0 else out


def open_module_rise(efficiency, poa_global, wind_speed, u0: float = U0_FAIMAN,
                     u1: float = U1_FAIMAN):
    """Temperature rise of a module (or substring) that delivers no power.

    A producing module exports the share ``eta`` of the irradiance as electricity; an
    open-circuited module, or a substring whose bypass diode conducts, turns it into heat
    instead. With the Faiman heat balance the extra heat flux ``eta * G`` raises it by

    ``rise = eta * G / U(v)``

    above producing neighbours. Lateral conduction to cooler neighbouring cells makes a
    narrow strip run somewhat below this; the classifier's tolerance bands allow for it.

    Parameters
    ----------
    efficiency : float or array-like
        Module efficiency at STC, ``pmax / (1000 W/m2 * area)`` [-].
    poa_global : float or array-like
        Plane-of-array irradiance [W/m2].
    wind_speed : float or array-like
        Wind speed [m/s].
    u0, u1 : float
        Faiman coefficients [W/(m2 K)], [W s/(m3 K)].

    Returns
    -------
    float or ndarray
        Expected rise [K]; NaN where irradiance is not positive.

    References
    ----------
    .. [1] D. Faiman, Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    eta = np.asarray(efficiency, dtype=float)
    g = np.asarray(poa_global, dtype=float)
    rise = np.where(g > 0, eta * g / faiman_u(wind_speed, u0, u1), np.nan)
    rise = np.asarray(rise, dtype=float)
    return float(rise) if rise.ndim == 0 else rise


# --------------------------------------------------------------------------------------
# local reference
# --------------------------------------------------------------------------------------

_REFERENCE_DEFAULTS = {
    "row_neighbours": 6,
    "row_radius_m": 15.0,
    "min_row_neighbours": 3,
    "window_neighbours": 8,
    "window_radius_m": 25.0,
    "outlier_mad": 3.5,
    "outlier_floor_k": 1.0,
    "iterations": 2,
    "trend_correction": True,
    "trend_max_shift_m": 5.0,
    "u0": U0_FAIMAN,
    "u1": U1_FAIMAN,
    "g_ref_w_m2": 1000.0,
    "wind_ref_m_s": 1.0,
}


def _section(settings, name: str, defaults: Mapping) -> dict:
    """Pick section ``name`` out of a Pipeline, or take a section mapping as it is."""
    out = dict(defaults)
    if settings is None:
        return out
    sec = settings
    try:
        if name in settings:
            sec = settings[name]
    except Exception:  # a Pipeline raises PipelineError (not KeyError) for a missing section
        sec = settings
    out.update(dict(sec))
    return out


def module_centres(modules: pd.DataFrame) -> np.ndarray:
    """Module centres from the module-local frame, ``f0 + (fu + fv) / 2`` [m], shape (n, 2)."""
    cols = ("fx0", "fy0", "fux", "fuy", "fvx", "fvy")
    if all(c in modules.columns for c in cols):
        f = {c: np.asarray(modules[c], dtype=float) for c in cols}
        return np.column_stack([f["fx0"] + 0.5 * (f["fux"] + f["fvx"]),
                                f["fy0"] + 0.5 * (f["fuy"] + f["fvy"])])
    geom = modules.geometry.centroid
    return np.column_stack([geom.x.to_numpy(), geom.y.to_numpy()])


def _row_keys(modules: pd.DataFrame) -> np.ndarray:
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


def _knn(points: np.ndarray, pool: np.ndarray, k: int, radius: float) -> np.ndarray:
    """Indices (into ``pool``) of the k nearest pool points of each point, -1 when missing,
    the point itself excluded."""
    n = len(points)
    if len(pool) == 0 or k <= 0:
        return np.full((n, max(k, 0)), -1, dtype=np.int64)
    tree = cKDTree(points[pool])
    kq = min(k + 1, len(pool))
    dist, idx = tree.query(points, k=kq, distance_upper_bound=radius)
    dist = dist.reshape(n, kq)
    idx = idx.reshape(n, kq)
    ok = np.isfinite(dist)
    glob = np.where(ok, pool[np.minimum(idx, len(pool) - 1)], -1)
    glob[glob == np.arange(n)[:, None]] = -1  # drop self
    # keep the first k valid entries per row (sorted by distance already)
    order = np.argsort(glob < 0, axis=1, kind="stable")
    glob = np.take_along_axis(glob, order, axis=1)[:, :k]
    if glob.shape[1] < k:
        glob = np.hstack([glob, np.full((n, k - glob.shape[1]), -1, dtype=np.int64)])
    return glob


def reference_neighbours(modules: pd.DataFrame, healthy_mask, settings=None,
                         *, exclude_group=None) -> np.ndarray:
    """The neighbours each module's reference is taken from.

    Same table row first: the ``row_neighbours`` nearest healthy modules of the module's
    own table row within ``row_radius_m``. Modules with fewer than ``min_row_neighbours``
    such neighbours (short rows, rows full of suspects, unknown tables) take the
    ``window_neighbours`` nearest healthy modules within ``window_radius_m`` instead.

    Parameters
    ----------
    modules : DataFrame
        Modules with the module-local frame columns (or a geometry) and optionally
        ``table_id``, ``table_row``.
    healthy_mask : array-like of bool
        Modules allowed to serve as reference.
    settings : Pipeline or mapping, optional
        The ``[reference]`` section (or a pipeline holding it).
    exclude_group : array-like of int, optional
        Group code per module (e.g. the string); neighbours of the same group are not
        used and the window search replaces the row search. -1 means "no group".

    Returns
    -------
    ndarray of int, shape (n, k)
        Module indices, -1 where there is none; ``k = max(row_neighbours, window_neighbours)``.
    """
    cfg = _section(settings, "reference", _REFERENCE_DEFAULTS)
    n = len(modules)
    healthy = np.asarray(healthy_mask, dtype=bool).copy()
    xy = module_centres(modules)
    healthy &= np.isfinite(xy).all(axis=1)
    k_row = int(cfg["row_neighbours"])
    k_win = int(cfg["window_neighbours"])
    k = max(k_row, k_win)
    out = np.full((n, k), -1, dtype=np.int64)
    finite = np.isfinite(xy).all(axis=1)
    xy0 = np.where(finite[:, None], xy, 0.0)
    span = float(np.ptp(xy0, axis=0).max()) if n else 0.0
    far = 10.0 * (span + float(cfg["row_radius_m"]) + float(cfg["window_radius_m"]) + 1.0)

    if exclude_group is None:
        rows = _row_keys(modules)
        # one KD-tree over (x, y, row * far): neighbours within row_radius_m share the row
        pts3 = np.column_stack([xy0, np.where(rows >= 0, rows, -np.arange(1, n + 1)) * far])
        pool = np.flatnonzero(healthy & (rows >= 0))
        row_nb = _knn(pts3, pool, k_row, float(cfg["row_radius_m"]))
        n_row = (row_nb >= 0).sum(axis=1)
        use_row = n_row >= int(cfg["min_row_neighbours"])
        out[use_row, :k_row] = row_nb[use_row]
        need = ~use_row
    else:
        need = np.ones(n, dtype=bool)
    if need.any():
        pool = np.flatnonzero(healthy)
        kq = k_win
        if exclude_group is not None:
            kq = k_win + 96  # ask for more (a string may hold dozens of the nearest), then drop it
        win = _knn(xy0, pool, kq, float(cfg["window_radius_m"]))
        if exclude_group is not None:
            grp = np.asarray(exclude_group, dtype=np.int64)
            same = (win >= 0) & (grp[np.maximum(win, 0)] == grp[:, None]) & (grp[:, None] >= 0)
            win = np.where(same, -1, win)
            order = np.argsort(win < 0, axis=1, kind="stable")
            win = np.take_along_axis(win, order, axis=1)[:, :k_win]
        out[need, :k_win] = win[need]
    return out


def _median_of(values: np.ndarray, nb: np.ndarray, xy: np.ndarray | None = None,
               max_shift_m: float = 5.0) -> np.ndarray:
    """Median of the neighbours' values; with ``xy``, corrected for a linear trend.

    The trend correction matters where the neighbours sit on one side (row ends): the
    median of the neighbours is then the value at their median position, not at the
    module's. Positions are projected on the main axis of the neighbours' offsets (the row
    direction for same-row neighbours); the slope is the Theil-Sen estimate (median of
    pairwise slopes), robust to a defective neighbour; the reference is the median value
    moved from the neighbours' median position to the module's. Only neighbours lying on
    a line through the module (within 0.5 m: a table row) are corrected, and only when
    their median position is within ``max_shift_m`` of the module.
    """
    n = len(values)
    if nb.shape[1] == 0:
        return np.full(n, np.nan)
    vals = np.where(nb >= 0, values[np.maximum(nb, 0)], np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        med = np.nanmedian(vals, axis=1)
        if xy is None:
            return med
        off = np.where((nb >= 0)[:, :, None], xy[np.maximum(nb, 0)] - xy[:, None, :], np.nan)
        # main axis of the offsets (sign-free): angle of the doubled-angle mean direction
        ang = np.arctan2(off[:, :, 1], off[:, :, 0])
        c2 = np.nanmean(np.cos(2 * ang), axis=1)
        s2 = np.nanmean(np.sin(2 * ang), axis=1)
        phi = 0.5 * np.arctan2(s2, c2)
        s = off[:, :, 0] * np.cos(phi)[:, None] + off[:, :, 1] * np.sin(phi)[:, None]
        perp = -off[:, :, 0] * np.sin(phi)[:, None] + off[:, :, 1] * np.cos(phi)[:, None]
        # only neighbours on a line through the module (its row): a 2-D window is left alone
        line = np.nanmax(np.abs(perp), axis=1) < 0.5
        k = nb.shape[1]
        ia, ib = np.triu_indices(k, 1)
        ds = s[:, ib] - s[:, ia]
        dv = vals[:, ib] - vals[:, ia]
        ok = np.abs(ds) > 0.2
        slope = np.nanmedian(np.where(ok, dv / np.where(ok, ds, 1.0), np.nan), axis=1)
        shift = np.nanmedian(s, axis=1)
    # extrapolate a few metres at most: beyond that a straight line is a guess
    near = np.abs(shift) <= max_shift_m
    corr = np.where(line & near & np.isfinite(slope) & np.isfinite(shift), -slope * shift, 0.0)
    return med + corr


@dataclass(frozen=True)
class ReferenceResult:
    """Outcome of :func:`local_reference` with ``return_details=True``.

    Attributes
    ----------
    reference_c : ndarray
        Reference temperature per module [degC].
    neighbours : ndarray of int, shape (n, k)
        The neighbours of the last pass (-1 = none).
    suspect : ndarray of bool
        Modules rejected as reference by the robust first pass.
    scale_k : float
        Robust spread (1.4826 * MAD) of healthy modules' deviation from the first-pass
        reference [K].
    """

    reference_c: np.ndarray
    neighbours: np.ndarray
    suspect: np.ndarray
    scale_k: float


def local_reference(modules: pd.DataFrame, t_module_c, healthy_mask=None, settings=None,
                    *, exclude_group=None, return_details: bool = False):
    """Each module's local reference temperature: the median of its healthy neighbours.

    The reference is local so that whatever varies slowly over the plant or steps at a
    table (mosaic seams, cloud shadows, irradiance drift during the flight, sky-reflection
    gradients) is shared by a module and its reference and cancels in ``delta_t``.
    Neighbours come from the same table row first, else a local window
    (:func:`reference_neighbours`). The estimate is iterated: a first robust pass
    (median of neighbours) gives each module's deviation; modules deviating by more than
    ``outlier_mad`` robust standard deviations (1.4826 * MAD, at least
    ``outlier_floor_k``) become suspects and are excluded from the neighbours of the next
    pass, so defective modules do not pollute their neighbours' reference. In that last
    pass the median is corrected for a linear trend along the neighbours (Theil-Sen slope),
    so a module at a row end, whose neighbours all sit on one side, is not biased by a
    gradient (``trend_correction``).

    Parameters
    ----------
    modules : DataFrame or GeoDataFrame
        Modules (module-local frame columns, ``table_id``, ``table_row``), projected CRS [m].
    t_module_c : array-like
        Module temperature, normally the median true glass temperature [degC].
    healthy_mask : array-like of bool, optional
        Modules that may serve as reference (default: all with a finite temperature).
    settings : Pipeline or mapping, optional
        The ``[reference]`` section (or a pipeline holding it); defaults built in.
    exclude_group : array-like of int, optional
        Group code per module whose members must not serve as each other's reference
        (used to test a whole string against its surroundings); -1 = no group.
    return_details : bool
        Return a :class:`ReferenceResult` instead of the bare array.

    Returns
    -------
    ndarray or ReferenceResult
        Reference temperature per module [degC] (NaN when no healthy neighbour exists).

    Notes
    -----
    One KD-tree query over ``(x, y, row code * far)`` finds same-row neighbours for all
    modules at once; 25,000 modules take a fraction of a second.
    """
    cfg = _section(settings, "reference", _REFERENCE_DEFAULTS)
    t = np.asarray(t_module_c, dtype=float)
    n = len(t)
    if len(modules) != n:
        raise ValueError(f"local_reference: {len(modules)} modules but {n} temperatures")
    healthy = np.isfinite(t) if healthy_mask is None else (np.asarray(healthy_mask, bool) & np.isfinite(t))
    suspect = np.zeros(n, dtype=bool)
    scale = np.nan
    xy = module_centres(modules) if bool(cfg["trend_correction"]) else None
    nb = reference_neighbours(modules, healthy, cfg, exclude_group=exclude_group)
    ref = _median_of(t, nb)
    for _ in range(max(int(cfg["iterations"]) - 1, 0)):
        dev = t - ref
        ok = healthy & np.isfinite(dev)
        if ok.sum() < 3:
            break
        med = float(np.median(dev[ok]))
        scale = 1.4826 * float(np.median(np.abs(dev[ok] - med)))
        lim = max(float(cfg["outlier_mad"]) * scale, float(cfg["outlier_floor_k"]))
        new_suspect = healthy & np.isfinite(dev) & (np.abs(dev - med) > lim)
        if not (new_suspect & ~suspect).any():
            break
        suspect |= new_suspect
        nb = reference_neighbours(modules, healthy & ~suspect, cfg, exclude_group=exclude_group)
        ref = _median_of(t, nb)
    if xy is not None:
        ref = _median_of(t, nb, xy, float(cfg["trend_max_shift_m"]))
    logger.debug("local reference: %d suspects excluded, spread %.3f K", int(suspect.sum()), scale)
    if return_details:
        return ReferenceResult(ref, nb, suspect, scale)
    return ref
