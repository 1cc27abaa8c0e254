"""Mosaic seams and other image artefacts along table rows: find closed stretches, level them.

An orthomosaic is stitched from frames whose radiometric offsets differ a little (the
camera drifts between its flat-field corrections), so a seam adds a constant step [K] to
everything on one side of it; a sky reflection raises a patch of glass. Where such an
artefact covers part of a table row, the row's module temperatures step up (or down) at
one place and back at another. Defects follow the electrical layout instead: an open
string or PID stays within one string, an open module or a bypassed substring within one
module. So, along every table row (modules ordered by ``table_col``):

1. a candidate edge is a step of at least ``min_step_k`` between the medians of the
   ``window_modules`` modules either side of a boundary, the strongest within two
   modules;
2. an up edge followed by a down edge of about the same size (within ``match_abs_k`` +
   ``match_rel`` x the step) closes a stretch of at least ``min_modules``; each edge is
   then put at the boundary that best splits the row into the stretch's level and the
   levels outside it (least absolute deviation, so one module of the spread does not move
   it); its offset (median excess over the ``window_modules`` modules either side) must
   reach ``min_step_k`` and ``seam_z`` standard errors of a difference of means under the
   module-to-module spread (estimated from neighbour differences along the rows), since
   among thousands of rows a few stretches of three modules stand out by chance;
3. the stretch is an artefact, and is levelled by its median excess over the modules
   either side, when it covers modules of more than one string, or when another row of
   its table has a stretch over at least half of the same columns at a similar level (a
   seam or a reflection crosses rows; a defect of one string does not repeat in the row
   beside it).

Stretches that run to the end of a row are left alone (which side would be the artefact is
not known from the row). Every module, cell and substring statistic of a levelled module
is shifted by the same offset.
"""
from __future__ import annotations

import logging
from collections.abc import Mapping
from dataclasses import dataclass
from dataclasses import replace as dc_replace
from typing import Any

import numpy as np
import pandas as pd

from pvscan.io.settings import section
from pvscan.measure.rows import row_keys
from pvscan.robust import nanmedian, scaled_mad

__all__ = ["Stretch", "find_stretches", "level_stats"]

log = logging.getLogger(__name__)

_TABLE_COLS = ("t_mean_c", "t_median_c", "t_p95_c", "t_max_c", "t_min_c")


@dataclass
class Stretch:
    """A closed stretch of a table row levelled as an image artefact.

    Attributes
    ----------
    modules : numpy.ndarray
        Indices of its modules, in row order.
    offset_k : float
        Its median excess over the modules either side [K] (subtracted when levelling).
    reason : str
        ``"strings"`` (it covers more than one string) or ``"rows"`` (another row of its
        table has a matching stretch).
    """

    modules: np.ndarray
    offset_k: float
    reason: str


def _steps(t: np.ndarray, w: int) -> np.ndarray:
    """Step at each boundary b (between positions b and b+1): median of the next ``w`` minus
    the median of the previous ``w`` (NaN where either side has fewer than two values).
    ``t`` is one row profile, or several of one length stacked (rows along axis 0)."""
    t = np.asarray(t, dtype=float)
    n = t.shape[-1]
    if n < 2:
        return np.full(t.shape[:-1] + (0,), np.nan)
    pad = np.full(t.shape[:-1] + (w - 1,), np.nan)
    win = np.lib.stride_tricks.sliding_window_view(np.concatenate([pad, t, pad], axis=-1), w, axis=-1)
    left, right = win[..., :n - 1, :], win[..., w:w + n - 1, :]  # modules b-w+1..b and b+1..b+w
    ok = (np.isfinite(left).sum(axis=-1) >= 2) & (np.isfinite(right).sum(axis=-1) >= 2)
    return np.where(ok, nanmedian(right, axis=-1) - nanmedian(left, axis=-1), np.nan)


def _best_split(t: np.ndarray, b: int, lo: int, hi: int, level_in: float, level_out: float,
                inside_right: bool) -> int:
    """The boundary in ``lo..hi`` that best separates outside and inside levels (L1)."""
    best, cost_best = b, np.inf
    n = len(t)
    span = np.arange(max(lo - 1, 0), min(hi + 2, n))
    for c in range(max(lo, 0), min(hi, n - 2) + 1):
        inside = span > c if inside_right else span <= c
        lev = np.where(inside, level_in, level_out)
        cost = float(np.nansum(np.abs(t[span] - lev)))
        if cost < cost_best - 1e-9:
            best, cost_best = c, cost
    return best


def _closed_stretches(t: np.ndarray, cfg: Mapping[str, Any], sigma: float = 0.0,
                      st: np.ndarray | None = None) -> list[tuple[int, int, float]]:
    """(first, last, offset) position ranges of the closed stretches of one row profile.

    ``sigma`` [K] is the module-to-module spread; a stretch's offset must reach ``seam_z``
    standard errors of the difference of the two means (inside and outside). ``st``: the
    profile's steps (:func:`_steps`) when already computed.
    """
    w = int(cfg["window_modules"])
    n = len(t)
    if n < 2 * w:
        return []
    st = _steps(t, w) if st is None else st
    a = np.abs(np.nan_to_num(st, nan=0.0))
    sgn = np.sign(np.nan_to_num(st, nan=0.0))
    # the strongest edge of its sign within two boundaries (a short stretch has its opposite
    # edge that close)
    cand = [b for b in range(n - 1) if a[b] >= float(cfg["min_step_k"])
            and a[b] >= np.where(sgn[max(0, b - 2):b + 3] == sgn[b], a[max(0, b - 2):b + 3], 0.0).max()]
    tol_abs, tol_rel = float(cfg["match_abs_k"]), float(cfg["match_rel"])
    min_len = int(cfg["min_modules"])
    out, used = [], set()
    for i, b1 in enumerate(cand):
        if b1 in used:
            continue
        for b2 in cand[i + 1:]:
            s1, s2 = st[b1], st[b2]
            if np.sign(s1) == np.sign(s2):
                break  # another edge the same way first: not one closed stretch
            if abs(s1 + s2) <= tol_abs + tol_rel * max(abs(s1), abs(s2)):
                # refine both edges against the stretch's level and the levels outside it
                inner = t[b1 + 1:b2 + 1]
                lev_in = float(np.nanmedian(inner))
                left_out = t[max(0, b1 - w + 1):b1 + 1]
                right_out = t[b2 + 1:b2 + 1 + w]
                lev_l, lev_r = float(np.nanmedian(left_out)), float(np.nanmedian(right_out))
                # (the medians of a few modules place an edge only to within a module or two)
                e1 = _best_split(t, b1, b1 - 2, b1 + 2, lev_in, lev_l, inside_right=True)
                e2 = _best_split(t, b2, b2 - 2, b2 + 2, lev_in, lev_r, inside_right=False)
                if e2 - e1 >= min_len:
                    first, last = e1 + 1, e2
                    outside = np.concatenate([t[max(0, first - w):first], t[last + 1:last + 1 + w]])
                    inside = t[first:last + 1]
                    offset = float(np.nanmedian(inside) - np.nanmedian(outside))
                    n_in, n_out = int(np.isfinite(inside).sum()), int(np.isfinite(outside).sum())
                    se = sigma * np.sqrt(1.0 / max(n_in, 1) + 1.0 / max(n_out, 1))
                    if abs(offset) >= float(cfg["min_step_k"]) and abs(offset) >= float(cfg["seam_z"]) * se:
                        out.append((first, last, offset))
                        used |= {b1, b2}
            break
    return out


def find_stretches(modules: pd.DataFrame, t_median: np.ndarray,
                   settings: Mapping[str, Any] | None = None) -> list[Stretch]:
    """Closed stretches of table rows that are image artefacts (see the module notes).

    Parameters
    ----------
    modules : DataFrame
        ``table_id``, ``table_row``, ``table_col`` and, when known, ``string_id``.
    t_median : numpy.ndarray
        (n,) module median temperature [degC].
    settings : Pipeline or mapping, optional
        The ``[seams]`` section.

    Returns
    -------
    list of Stretch
    """
    cfg = section(settings, "seams")
    n = len(modules)
    if n == 0 or "table_col" not in modules.columns:
        return []
    keys = row_keys(modules)
    col = pd.to_numeric(modules["table_col"], errors="coerce").to_numpy(dtype=float)
    table = modules["table_id"].astype("string").fillna("").to_numpy() if "table_id" in modules else np.full(n, "")
    has_strings = "string_id" in modules.columns and modules["string_id"].notna().any()
    sid = modules["string_id"].astype("string").fillna("").to_numpy() if has_strings else None
    t = np.asarray(t_median, dtype=float)
    rows = []
    for k in np.unique(keys[keys >= 0]):
        mem = np.flatnonzero((keys == k) & np.isfinite(col))
        rows.append((int(k), mem[np.argsort(col[mem], kind="stable")]))
    # the module-to-module spread: robust spread of the differences between neighbours along
    # the rows, over sqrt(2) (seams and defects are few among the differences)
    diffs = np.concatenate([np.diff(t[mem]) for _, mem in rows if len(mem) > 1] or [np.zeros(0)])
    diffs = diffs[np.isfinite(diffs)]
    sigma = scaled_mad(diffs) / np.sqrt(2.0) if diffs.size >= 10 else 0.0
    # steps of all rows of one length in one vectorised call
    w = int(cfg["window_modules"])
    steps = {}
    for length in {len(mem) for _, mem in rows}:
        same = [(k, mem) for k, mem in rows if len(mem) == length]
        st = _steps(np.stack([t[mem] for _, mem in same]), w)
        steps.update({k: st[j] for j, (k, _) in enumerate(same)})
    found = []  # (row key, modules, offset)
    for k, mem in rows:
        for first, last, offset in _closed_stretches(t[mem], cfg, sigma, steps[k]):
            found.append((int(k), mem[first:last + 1], offset))
    tol_abs, tol_rel = float(cfg["match_abs_k"]), float(cfg["match_rel"])
    out = []
    for j, (k, seg, off) in enumerate(found):
        if sid is not None and len(set(sid[seg]) - {""}) > 1:  # modules without a string do not count
            out.append(Stretch(seg, off, "strings"))
            continue
        cols = set(col[seg].tolist())
        for j2, (k2, seg2, off2) in enumerate(found):
            if (j2 != j and k2 != k and table[seg2[0]] == table[seg[0]] and np.sign(off2) == np.sign(off)
                    and abs(off2 - off) <= tol_abs + tol_rel * abs(off)
                    and len(cols & set(col[seg2].tolist())) >= 0.5 * len(cols)):
                out.append(Stretch(seg, off, "rows"))
                break
    log.debug("seams: %d closed stretches, %d levelled", len(found), len(out))
    return out


def level_stats(stats: Any, stretches: list[Stretch]) -> tuple[Any, np.ndarray]:
    """A copy of the statistics with each stretch's offset subtracted from its modules.

    Module (``t_mean_c`` ... ``t_min_c``), cell and substring temperatures [degC] shift;
    ``t_std_k`` and the counts do not.

    Returns
    -------
    (stats, offsets)
        The levelled statistics and the (n,) offsets subtracted [K].
    """
    n = len(stats.table)
    offsets = np.zeros(n)
    for s in stretches:
        offsets[s.modules] = s.offset_k
    if not offsets.any():
        return stats, offsets
    table = stats.table.copy()
    for c in _TABLE_COLS:
        if c in table:
            table[c] = table[c].to_numpy(dtype=float) - offsets
    o3 = offsets[:, None, None]
    o2 = offsets[:, None]
    return dc_replace(stats, table=table,
                      cell_median=(stats.cell_median - o3).astype(stats.cell_median.dtype),
                      cell_p95=(stats.cell_p95 - o3).astype(stats.cell_p95.dtype),
                      sub_median=(stats.sub_median - o2).astype(stats.sub_median.dtype),
                      sub_p95=(stats.sub_p95 - o2).astype(stats.sub_p95.dtype)), offsets
