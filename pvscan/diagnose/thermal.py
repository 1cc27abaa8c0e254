"""The thermal stage: each module's local healthy reference, delta T and normalised delta T.

* :func:`local_reference`: each module's reference temperature, the median of its healthy
  neighbours (same table row first, else a local window), computed twice so that defective
  modules do not pull their neighbours' reference up;
* :class:`Normalisation`: a temperature difference driven by absorbed power, scaled to the
  reference conditions of ``[reference]`` (irradiance, wind) with the Faiman heat-loss
  coefficient of ``[heat]`` (:mod:`pvscan.physics.heat`, the one home of the model);
* :func:`module_thermal`: ``delta_t_k`` and ``delta_t_norm_k`` of every module against its
  reference (CONTRACT: ``delta_t_norm_k = delta_t_k * (1000 / G) * U(v) / U(1 m/s)``).

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
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree

from pvscan.io.settings import section
from pvscan.measure.rows import module_centres, row_keys
from pvscan.physics.heat import U0_FAIMAN_2008, U1_FAIMAN_2008, Faiman
from pvscan.robust import numpy_nanmedian_rows, scaled_mad

__all__ = [
    "local_reference",
    "reference_neighbours",
    "ReferenceResult",
    "Normalisation",
    "ModuleThermal",
    "module_thermal",
    "condition_column",
]

logger = logging.getLogger(__name__)

#: Published Faiman coefficients, kept here for callers that have not moved to
#: :mod:`pvscan.physics.heat` (a run takes its coefficients from ``[heat]``).
U0_FAIMAN = U0_FAIMAN_2008
U1_FAIMAN = U1_FAIMAN_2008


@dataclass(frozen=True)
class Normalisation:
    """Scales temperature differences to reference irradiance and wind (Faiman).

    Attributes
    ----------
    heat : Faiman
        Heat-loss coefficients of the run (``[heat]``).
    g_ref_w_m2 : float
        Reference irradiance (``[reference] g_ref_w_m2``). [W/m2]
    wind_ref_m_s : float
        Reference wind speed (``[reference] wind_ref_m_s``). [m/s]
    """

    heat: Faiman
    g_ref_w_m2: float
    wind_ref_m_s: float

    @classmethod
    def from_settings(cls, settings: Mapping[str, Any] | None) -> Normalisation:
        """From a pipeline (sections ``[heat]`` and ``[reference]``); None: the defaults."""
        ref = section(settings, "reference")
        return cls(Faiman.from_settings(section(settings, "heat")), float(ref["g_ref_w_m2"]),
                   float(ref["wind_ref_m_s"]))

    def __call__(self, delta_t_k: ArrayLike, poa_global: ArrayLike, wind_speed: ArrayLike) -> Any:
        """``delta_t_k * (g_ref / G) * U(v) / U(wind_ref)`` [K]; NaN where G is not positive."""
        return self.heat.normalise(delta_t_k, poa_global, wind_speed, g_ref=self.g_ref_w_m2,
                                   wind_ref=self.wind_ref_m_s)

    def to_dict(self) -> dict[str, float]:
        """The record of ``summary.json`` (``normalisation``)."""
        return {**self.heat.to_dict(), "g_ref_w_m2": self.g_ref_w_m2, "wind_ref_m_s": self.wind_ref_m_s}


def condition_column(conditions: pd.DataFrame | None, name: str, n: int) -> np.ndarray:
    """Column ``name`` of the per-module conditions as floats, NaN when absent."""
    if conditions is None or name not in conditions:
        return np.full(n, np.nan)
    return conditions[name].to_numpy(dtype=float)


@dataclass(frozen=True)
class ModuleThermal:
    """Per-module outcome of the thermal stage, aligned with the modules.

    Attributes
    ----------
    reference_c : ndarray
        Local healthy reference. [degC]
    delta_t_k : ndarray
        ``t_median_c - reference_c``. [K]
    delta_t_norm_k : ndarray
        ``delta_t_k`` at the reference conditions. [K]
    """

    reference_c: np.ndarray
    delta_t_k: np.ndarray
    delta_t_norm_k: np.ndarray


def module_thermal(t_median_c: ArrayLike, reference_c: ArrayLike, conditions: pd.DataFrame | None,
                   norm: Normalisation) -> ModuleThermal:
    """Every module's delta T against its reference, and normalised.

    Parameters
    ----------
    t_median_c : array-like
        Median true glass temperature per module. [degC]
    reference_c : array-like
        Local reference per module (:func:`local_reference`). [degC]
    conditions : DataFrame
        ``poa_global`` [W/m2] and ``wind_speed`` [m/s] when each module was imaged.
    norm : Normalisation

    Returns
    -------
    ModuleThermal
    """
    t = np.asarray(t_median_c, dtype=float)
    ref = np.asarray(reference_c, dtype=float)
    dt = t - ref
    n = len(t)
    dtn = norm(dt, condition_column(conditions, "poa_global", n), condition_column(conditions, "wind_speed", n))
    return ModuleThermal(ref, dt, np.asarray(dtn, dtype=float).reshape(n))


# --------------------------------------------------------------------------------------
# local reference
# --------------------------------------------------------------------------------------

#: Modules queried at a time by :func:`_knn` (bounds its (modules x neighbours) temporaries).
_KNN_CHUNK = 8192
#: Extra neighbours :func:`_knn` asks for first beyond those it keeps when it drops a group.
_KNN_SPARE = 16


def _knn_pick(dist: np.ndarray, idx: np.ndarray, pool: np.ndarray, rows: np.ndarray, k: int, width: int,
              group: np.ndarray | None) -> np.ndarray:
    """The answer of :func:`_knn` for the points ``rows`` from their query ``dist``, ``idx``
    (sorted by distance; missing: ``dist`` inf)."""
    ok = np.isfinite(dist)
    glob = np.where(ok, pool[np.minimum(idx, len(pool) - 1)], -1)
    glob[glob == rows[:, None]] = -1  # drop self
    # keep the first k valid entries per row (sorted by distance already)
    order = np.argsort(glob < 0, axis=1, kind="stable")
    glob = np.take_along_axis(glob, order, axis=1)[:, :k]
    if group is not None:
        own = group[rows, None]
        same = (glob >= 0) & (group[np.maximum(glob, 0)] == own) & (own >= 0)
        glob = np.where(same, -1, glob)
        order = np.argsort(glob < 0, axis=1, kind="stable")
        glob = np.take_along_axis(glob, order, axis=1)[:, :width]
    return glob


def _knn_settled(dist: np.ndarray, idx: np.ndarray, pool: np.ndarray, rows: np.ndarray, width: int,
                 group: np.ndarray) -> np.ndarray:
    """Rows whose short query (the ``kf`` nearest) already gives their whole answer: a longer
    query lists the same nearest entries in the same order while the distances strictly
    increase, so a row is settled when it holds ``width`` kept entries (outside its group) and
    no tie up to the entry after the last of them, or when it lists every pool point within
    the radius (last entry missing) without a tie. Other rows are asked again in full."""
    ok = np.isfinite(dist)
    glob = np.where(ok, pool[np.minimum(idx, len(pool) - 1)], -1)
    own = group[rows, None]
    kept = (glob >= 0) & (glob != rows[:, None]) & ~((group[np.maximum(glob, 0)] == own) & (own >= 0))
    count = np.cumsum(kept, axis=1)
    tie = np.cumsum((dist[:, 1:] == dist[:, :-1]) & ok[:, :-1], axis=1) > 0  # a tie at or before j, j + 1
    kf = dist.shape[1]
    last = np.argmax(count >= width, axis=1)  # position of the width-th kept entry
    enough = count[:, -1] >= width
    inside = last < kf - 1
    full = enough & inside & ~tie[np.arange(len(rows)), np.minimum(last, kf - 2)]
    complete = ~enough & ~ok[:, -1] & ~tie[:, -1]
    return full | complete


def _knn(points: np.ndarray, pool: np.ndarray, k: int, radius: float, *, group: np.ndarray | None = None,
         keep: int | None = None) -> np.ndarray:
    """Indices (into ``points``) of the k nearest pool points of each point, -1 when missing,
    the point itself excluded.

    With ``group`` (a code per point, -1 = none), neighbours of the point's own group are
    then dropped and the first ``keep`` of the rest returned. Points are queried in chunks
    (each point's answer does not depend on the others), so the temporaries stay bounded.
    With a group, each point first asks for ``keep + 1 + _KNN_SPARE`` neighbours; those this
    settles (:func:`_knn_settled`: the full query's answer) keep it, the rest ask for all k.
    """
    n = len(points)
    width = k if keep is None else keep
    if len(pool) == 0 or k <= 0:
        return np.full((n, max(width, 0)), -1, dtype=np.int64)
    tree = cKDTree(points[pool])
    kq = min(k + 1, len(pool))
    kf = min(width + 1 + _KNN_SPARE, kq) if group is not None else kq
    out = np.full((n, width), -1, dtype=np.int64)
    for s in range(0, n, _KNN_CHUNK):
        e = min(s + _KNN_CHUNK, n)
        rows = np.arange(s, e)
        dist, idx = tree.query(points[s:e], k=kf, distance_upper_bound=radius)
        dist, idx = dist.reshape(e - s, kf), idx.reshape(e - s, kf)
        glob = _knn_pick(dist, idx, pool, rows, k, width, group)
        out[s:e, :glob.shape[1]] = glob
        if kf < kq and group is not None:
            again = rows[~_knn_settled(dist, idx, pool, rows, width, group)]
            if len(again):
                dist, idx = tree.query(points[again], k=kq, distance_upper_bound=radius)
                glob = _knn_pick(dist.reshape(len(again), kq), idx.reshape(len(again), kq), pool, again, k,
                                 width, group)
                out[again] = -1
                out[again, :glob.shape[1]] = glob
    return out


def reference_neighbours(modules: pd.DataFrame, healthy_mask: ArrayLike, settings: Mapping[str, Any] | None = None,
                         *, exclude_group: ArrayLike | None = None) -> np.ndarray:
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
    cfg = section(settings, "reference")
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
        rows = row_keys(modules)
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
        if exclude_group is None:
            win = _knn(xy0, pool, k_win, float(cfg["window_radius_m"]))
        else:
            # ask for more (a string may hold dozens of the nearest), then drop it
            win = _knn(xy0, pool, k_win + 96, float(cfg["window_radius_m"]),
                       group=np.asarray(exclude_group, dtype=np.int64), keep=k_win)
        out[need, :k_win] = win[need]
    return out


def _median_of(values: np.ndarray, nb: np.ndarray, xy: np.ndarray | None = None,
               max_shift_m: float = 5.0, rows: slice | None = None, min_k: int = 4) -> np.ndarray:
    """Median of the neighbours' values; with ``xy``, corrected for a linear trend.

    The trend correction matters where the neighbours sit on one side (row ends): the
    median of the neighbours is then the value at their median position, not at the
    module's. Positions are projected on the main axis of the neighbours' offsets (the row
    direction for same-row neighbours); the slope is the Theil-Sen estimate (median of
    pairwise slopes), robust to a defective neighbour; the reference is the median value
    moved from the neighbours' median position to the module's. Only neighbours lying on
    a line through the module (within 0.5 m: a table row) are corrected, and only when
    their median position is within ``max_shift_m`` of the module, and from ``min_k`` of them at least.

    ``nb`` may hold the neighbours of the modules ``rows`` only (a slice of all modules;
    ``values`` and ``xy`` stay whole): the result is then for those modules.
    """
    if nb.shape[1] == 0:
        return np.full(len(nb), np.nan)
    if len(nb) > _KNN_CHUNK:
        # row by row independent: in chunks of modules (bounded (modules x pairs) temporaries)
        return np.concatenate([_median_of(values, nb[s:s + _KNN_CHUNK], xy, max_shift_m, slice(s, s + _KNN_CHUNK),
                                          min_k) for s in range(0, len(nb), _KNN_CHUNK)])
    vals = np.where(nb >= 0, values[np.maximum(nb, 0)], np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        med = numpy_nanmedian_rows(vals)
        if xy is None:
            return med
        own = xy if rows is None else xy[rows]
        off = np.where((nb >= 0)[:, :, None], xy[np.maximum(nb, 0)] - own[:, None, :], np.nan)
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
        slope = numpy_nanmedian_rows(np.where(ok, dv / np.where(ok, ds, 1.0), np.nan))
        shift = numpy_nanmedian_rows(s)
    # extrapolate a few metres at most: beyond that a straight line is a guess
    near = (np.abs(shift) <= max_shift_m) & ((nb >= 0).sum(axis=1) >= min_k)
    corr = np.where(line & near & np.isfinite(slope) & np.isfinite(shift), -slope * shift, 0.0)
    return med + corr


def _table_columns(modules: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Code of each module's table column (``table_id``, ``table_col``) and of its table row;
    -1 where either is unknown."""
    n = len(modules)
    rows = row_keys(modules)
    if n == 0 or "table_id" not in modules.columns or "table_col" not in modules.columns:
        return np.full(n, -1, dtype=np.int64), rows
    col = pd.to_numeric(modules["table_col"], errors="coerce").to_numpy(dtype=float)
    known = np.isfinite(col) & modules["table_id"].notna().to_numpy() & (rows >= 0)
    keys = pd.Series(list(zip(modules["table_id"].astype(str), np.where(known, col, -1.0), strict=True)))
    code = pd.factorize(keys)[0].astype(np.int64)
    return np.where(known, code, -1), rows


def _column_others(values: np.ndarray, columns: np.ndarray, rows: np.ndarray,
                   exclude_group: np.ndarray | None = None) -> tuple[np.ndarray | None, np.ndarray]:
    """For each module of a known table column with a finite value: the values of the other
    members of its column (same table and ``table_col``) in the other rows of the table (and,
    with ``exclude_group``, of other groups), NaN elsewhere.

    Returns ``(order, vals)``: the module indices and, per module, a row of ``vals``; ``order``
    is None when no column holds two such modules.
    """
    use = (columns >= 0) & np.isfinite(values)
    if len(values) == 0 or use.sum() < 2:
        return None, np.empty((0, 0))
    idx = np.flatnonzero(use)
    order = idx[np.argsort(columns[idx], kind="stable")]
    cs = columns[order]
    starts = np.flatnonzero(np.r_[True, cs[1:] != cs[:-1]])
    sizes = np.diff(np.r_[starts, len(cs)])
    width = int(sizes.max())
    if width < 2:
        return None, np.empty((0, 0))
    slot = np.arange(len(cs)) - np.repeat(starts, sizes)
    grp = np.repeat(np.arange(len(starts)), sizes)
    mat = np.full((len(starts), width), -1, dtype=np.int64)
    mat[grp, slot] = order
    # each member of a column against the other members (own row and own group left out)
    others = mat[grp]
    valid = others >= 0
    o = np.maximum(others, 0)
    valid &= rows[o] != rows[order][:, None]
    if exclude_group is not None:
        own = exclude_group[order][:, None]
        valid &= ~((exclude_group[o] == own) & (own >= 0))
    return order, np.where(valid, values[o], np.nan)


def _column_correction(t: np.ndarray, ref: np.ndarray, columns: np.ndarray, rows: np.ndarray,
                       cfg: Mapping[str, Any], exclude_group: np.ndarray | None = None) -> np.ndarray:
    """The correction [K] to add to each module's row reference where its table column is colder
    than the row references in every other row of the table (a step shared by the rows).

    A mosaic seam or a cloud-shadow edge that crosses a table across its rows makes the modules
    beyond it colder or warmer than the same-row neighbours they are compared with; at a table's
    end those neighbours all lie on the other side of the step and the trend correction cannot
    reach them. The other rows' modules of the same table column share the step: their
    deviations ``e = t - reference`` give it: the median of the rows within
    ``column_match_abs_k + column_match_rel * |step|`` of their median, ``column_min_rows``
    of them at least, none colder than that (a warmer row may hold a defect at that column
    and is left out). Only a colder column
    (a step of at least ``column_min_step_k`` below the row references) moves the reference:
    every defect heats a module, so a column colder in every row is the image or the
    irradiance, whereas a warmer one may be defects at the same place of several strings
    (PID at the strings' negative ends). The module's own value is not used, nor, with
    ``exclude_group``, modules of its own group (string).
    """
    n = len(t)
    out = np.zeros(n)
    e = t - ref
    order, vals = _column_others(e, columns, rows, exclude_group)
    if order is None:
        return out
    abs_k, rel = float(cfg["column_match_abs_k"]), float(cfg["column_match_rel"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        step = np.nanmedian(vals, axis=1)
        # the rows that share the step; a row warmer than that may hold a defect there (left out),
        # a row colder than that means no common step
        near = np.abs(vals - step[:, None]) <= (abs_k + rel * np.abs(step))[:, None]
        step = np.nanmedian(np.where(near, vals, np.nan), axis=1)
        tol = (abs_k + rel * np.abs(step))[:, None]
        near = np.abs(vals - step[:, None]) <= tol
        colder = (vals < step[:, None] - tol).any(axis=1)
    apply = ((near.sum(axis=1) >= int(cfg["column_min_rows"])) & ~colder
             & (step <= -float(cfg["column_min_step_k"])))
    out[order[apply]] = step[apply]
    return out


def _row_block_suspects(t: np.ndarray, dev: np.ndarray, med: float, lim: float, healthy: np.ndarray,
                        columns: np.ndarray, rows: np.ndarray,
                        cfg: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray] | None:
    """The rows whose own reference the row's warm majority carries (a mask of their modules) and
    their suspects, judged against their table columns instead; None when no row is.

    Every defect heats a module. A row whose modules read well below their row reference (by
    more than the outlier limit ``lim`` [K] about the flight's median deviation ``med`` [K]) while
    they read level with the modules of their table column in the table's other rows (the
    median of those, within the same kind of limit about its flight median) is a row whose
    reference is warm: most of its modules are raised together (an open string and an open
    module filling the row of a table whose stringing is unknown). With ``row_block_min_cold``
    such modules or more in a row, that row's suspects are the modules warmer than their
    column by more than the limit, and its cold modules stay healthy references.
    """
    order, vals = _column_others(t, columns, rows)
    if order is None:
        return None
    level = np.full(len(t), np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        level[order] = np.nanmedian(vals, axis=1)
    dev_c = t - level
    ok_c = healthy & np.isfinite(dev_c)
    if ok_c.sum() < 3:
        return None
    med_c = float(np.median(dev_c[ok_c]))
    lim_c = max(float(cfg["outlier_mad"]) * scaled_mad(dev_c[ok_c]), float(cfg["outlier_floor_k"]))
    with np.errstate(invalid="ignore"):
        cold = healthy & (dev - med < -lim) & (np.abs(dev_c - med_c) <= lim_c) & (rows >= 0)
    if not cold.any():
        return None
    k, cnt = np.unique(rows[cold], return_counts=True)
    broken = k[cnt >= int(cfg["row_block_min_cold"])]
    if len(broken) == 0:
        return None
    in_broken = np.isin(rows, broken)
    with np.errstate(invalid="ignore"):
        warm = healthy & in_broken & (dev_c - med_c > lim_c)
    logger.debug("row reference: %d rows carried by their warm majority, %d modules suspect against their columns",
                 len(broken), int(warm.sum()))
    return in_broken, warm


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


def local_reference(modules: pd.DataFrame, t_module_c: ArrayLike, healthy_mask: ArrayLike | None = None,
                    settings: Mapping[str, Any] | None = None, *, exclude_group: ArrayLike | None = None,
                    return_details: bool = False) -> Any:
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
        Reference temperature per module [degC] (NaN when no healthy neighbour exists), or
        the :class:`ReferenceResult` with ``return_details``.

    Notes
    -----
    One KD-tree query over ``(x, y, row code * far)`` finds same-row neighbours for all
    modules at once; 25,000 modules take a fraction of a second.
    """
    cfg = section(settings, "reference")
    t = np.asarray(t_module_c, dtype=float)
    n = len(t)
    if len(modules) != n:
        raise ValueError(f"local_reference: {len(modules)} modules but {n} temperatures")
    healthy = np.isfinite(t) if healthy_mask is None else (np.asarray(healthy_mask, bool) & np.isfinite(t))
    suspect = np.zeros(n, dtype=bool)
    scale = np.nan
    xy = module_centres(modules) if bool(cfg["trend_correction"]) else None
    nb = reference_neighbours(modules, healthy, cfg, exclude_group=exclude_group)
    row_block = bool(cfg["row_block_check"]) and exclude_group is None
    columns, rows = (_table_columns(modules) if bool(cfg["column_correction"]) or row_block
                     else (None, None))
    groups = None if exclude_group is None else np.asarray(exclude_group, dtype=np.int64)

    def follow_columns(r: np.ndarray) -> np.ndarray:
        if columns is None or rows is None or not bool(cfg["column_correction"]):
            return r
        return r + _column_correction(t, r, columns, rows, cfg, groups)

    ref = follow_columns(_median_of(t, nb))
    for _ in range(max(int(cfg["iterations"]) - 1, 0)):
        dev = t - ref
        ok = healthy & np.isfinite(dev)
        if ok.sum() < 3:
            break
        med = float(np.median(dev[ok]))
        scale = scaled_mad(dev[ok])
        lim = max(float(cfg["outlier_mad"]) * scale, float(cfg["outlier_floor_k"]))
        new_suspect = healthy & np.isfinite(dev) & (np.abs(dev - med) > lim)
        if row_block and columns is not None and rows is not None:
            block = _row_block_suspects(t, dev, med, lim, healthy, columns, rows, cfg)
            if block is not None:
                new_suspect = np.where(block[0], block[1], new_suspect)
        if not (new_suspect & ~suspect).any():
            break
        suspect |= new_suspect
        nb = reference_neighbours(modules, healthy & ~suspect, cfg, exclude_group=exclude_group)
        ref = follow_columns(_median_of(t, nb))
    if xy is not None:
        # the trend along the row where no column step explains the module (a line fitted
        # across a step is neither the one level nor the other)
        plain = _median_of(t, nb)
        stepped = follow_columns(plain)
        trend = _median_of(t, nb, xy, float(cfg["trend_max_shift_m"]), min_k=int(cfg["trend_min_neighbours"]))
        ref = np.where(stepped != plain, stepped, trend)
    logger.debug("local reference: %d suspects excluded, spread %.3f K", int(suspect.sum()), scale)
    if return_details:
        return ReferenceResult(ref, nb, suspect, scale)
    return ref
