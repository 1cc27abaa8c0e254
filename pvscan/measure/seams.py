"""Mosaic seams and other image artefacts along table rows: find closed stretches, level them.

An orthomosaic is stitched from frames whose radiometric offsets differ a little (the
camera drifts between its flat-field corrections), so a seam adds a constant step [K] to
everything on one side of it; a sky reflection raises a patch of glass. Where such an
artefact covers part of a table row, the row's module temperatures step up (or down) at
one place and back at another. Defects follow the electrical layout instead: an open
string or PID stays within one string, an open module or a bypassed substring within one
module. So, along every table row (modules ordered by ``table_col``):

1. every window of at least ``min_modules`` modules with two or more modules on each side
   is a candidate; the one kept is the best box fit of the row (least absolute deviation
   from one level inside the window and one outside it: one module off the level neither
   moves an edge nor makes a stretch, and a window taking in modules of the outside level
   fits worse);
2. its offset (median inside minus the median of the rest of the row) must reach
   ``min_step_k`` and ``seam_z`` standard errors of a difference of means under the
   module-to-module spread (estimated from neighbour differences along the rows, again
   once the stretches found are levelled), with the inside median taken at the order
   statistic nearer the outside level (a stretch of two modules needs both raised); and
   the row must step back: the medians of the ``window_modules`` modules either side lie
   each at least half the offset away, on the same side, within ``match_abs_k`` +
   ``match_rel`` x the offset of each other. Found stretches are levelled in a working copy
   and the row is fitted again for more;
3. the stretch is an artefact, and is levelled by its offset, when it covers modules of
   more than one string, or when another row of its table has a stretch over at least
   half of the same columns at a similar level (a seam or a reflection crosses rows; a
   defect of one string does not repeat in the row beside it), or (``level_cold_in_string``)
   when it is colder than the modules either side and they and it belong to one string (a
   string's faults only warm its modules: an open string all of them, PID from its negative
   end; so a string cooler in its middle than at both sides is the image's doing, such as two
   seams over a one-row table whose string opened).

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
from pvscan.measure._memory import release_freed_memory
from pvscan.measure.rows import row_keys
from pvscan.robust import scaled_mad

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
        Its median excess over the rest of its row [K] (subtracted when levelling).
    reason : str
        ``"strings"`` (it covers more than one string), ``"rows"`` (another row of its
        table has a matching stretch) or ``"cold"`` (colder than the same string either side).
    """

    modules: np.ndarray
    offset_k: float
    reason: str


#: Elements (rows x windows x modules) of the arrays of one batch of rows in
#: :func:`_closed_stretches_rows` (bounds its temporaries to a few MB each).
_BATCH_ELEMENTS = 1 << 19


def _masked_median(rows: np.ndarray, mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Lower and upper median of each row of ``rows`` over each line of ``mask``, and the count.

    ``rows``: (r, n) values (NaN ignored); ``mask``: (k, n); results (r, k). The median of an
    even count is the mean of the two; the lower (upper) one alone is the value nearer the
    low (high) end.
    """
    n = rows.shape[1]
    use = mask[None, :, :] & np.isfinite(rows)[:, None, :]
    cnt = use.sum(axis=2)
    srt = np.sort(np.where(use, rows[:, None, :], np.inf), axis=2)
    lo_i = np.clip((cnt - 1) // 2, 0, n - 1)
    hi_i = np.clip(cnt // 2, 0, n - 1)
    lo = np.take_along_axis(srt, lo_i[:, :, None], axis=2)[:, :, 0]
    hi = np.take_along_axis(srt, hi_i[:, :, None], axis=2)[:, :, 0]
    none = cnt == 0
    return np.where(none, np.nan, lo), np.where(none, np.nan, hi), cnt


def _closed_stretches(t: np.ndarray, cfg: Mapping[str, Any], sigma: float = 0.0) -> list[tuple[int, int, float]]:
    """(first, last, offset) position ranges of the closed stretches of one row profile.

    Every window of at least ``min_modules`` modules with two or more modules on each side
    is a candidate. The window kept is the best box fit of the row (least absolute
    deviation of the row from one level inside the window and one outside it, so one
    module off the level neither moves an edge nor makes a stretch). Its offset is the
    median inside minus the median of the ``window_modules`` modules either side; it counts
    when the two sides agree (within ``match_abs_k`` + ``match_rel`` x the offset: the row
    steps back to where it was) and the offset, with the inside median taken at the order
    statistic nearer the outside level (so that a stretch of two modules needs both
    raised), reaches ``min_step_k`` and ``seam_z`` standard errors
    ``sigma * sqrt(1/n_in + 1/n_out)`` (``sigma`` [K] the module-to-module spread). Its
    modules are then levelled in a working copy and the row is fitted again for further
    stretches that do not overlap it.
    """
    return _closed_stretches_rows(np.asarray(t, dtype=float)[None, :], cfg, sigma)[0]


def _closed_stretches_rows(profiles: np.ndarray, cfg: Mapping[str, Any],
                           sigma: float = 0.0) -> list[list[tuple[int, int, float]]]:
    """:func:`_closed_stretches` of every row of ``profiles`` (r, n): rows of one length,
    fitted together a batch at a time (each row's figures depend on its own values only)."""
    w = int(cfg["window_modules"])
    min_len = int(cfg["min_modules"])
    min_step = float(cfg["min_step_k"])
    tol_abs, tol_rel = float(cfg["match_abs_k"]), float(cfg["match_rel"])
    z_min = float(cfg["seam_z"])
    profiles = np.asarray(profiles, dtype=float)
    n_rows, n = profiles.shape
    out: list[list[tuple[int, int, float]]] = [[] for _ in range(n_rows)]
    if n < min_len + 4:
        return out
    first, last = np.triu_indices(n, k=min_len - 1)
    keep = (first >= 2) & (last <= n - 3)
    first, last = first[keep], last[keep]
    pos = np.arange(n)
    inside = (pos >= first[:, None]) & (pos <= last[:, None])
    left = (pos < first[:, None]) & (pos >= first[:, None] - w)
    right = (pos > last[:, None]) & (pos <= last[:, None] + w)
    todo = np.flatnonzero(np.isfinite(profiles).sum(axis=1) >= min_len + 4)
    batch = max(1, _BATCH_ELEMENTS // max(len(first) * n, 1))
    for b0 in range(0, len(todo), batch):
        rows = todo[b0:b0 + batch]
        work = profiles[rows].copy()
        taken = np.zeros(work.shape, bool)
        active = np.ones(len(rows), bool)
        for _ in range(n // (min_len + 2) + 1):
            act = np.flatnonzero(active)
            if not act.size:
                break
            wk = work[act]
            fin = np.isfinite(wk)
            lo_in, hi_in, n_in = _masked_median(wk, inside)
            lo_r, hi_r, n_rest = _masked_median(wk, ~inside)
            m_in, m_rest = 0.5 * (lo_in + hi_in), 0.5 * (lo_r + hi_r)
            dev = np.where(inside[None, :, :], wk[:, None, :] - m_in[:, :, None], wk[:, None, :] - m_rest[:, :, None])
            cost = np.where(fin[:, None, :], np.abs(dev), 0.0).sum(axis=2)
            del dev
            lo_l, hi_l, n_l = _masked_median(wk, left)
            lo_rr, hi_rr, n_r = _masked_median(wk, right)
            m_l, m_r = 0.5 * (lo_l + hi_l), 0.5 * (lo_rr + hi_rr)
            # the inside level at the order statistic nearer the outside level
            lev_in = np.where(m_in >= m_rest, lo_in, hi_in)
            off = m_in - m_rest
            se = max(sigma, 1e-9) * np.sqrt(1.0 / np.maximum(n_in, 1) + 1.0 / np.maximum(n_rest, 1))
            with np.errstate(invalid="ignore"):
                # each side steps by at least half the offset, the same way, to about one level
                closed = ((np.sign(m_in - m_l) == np.sign(off)) & (np.sign(m_in - m_r) == np.sign(off))
                          & (np.abs(m_in - m_l) >= 0.5 * np.abs(off)) & (np.abs(m_in - m_r) >= 0.5 * np.abs(off))
                          & (np.abs(m_l - m_r) <= tol_abs + tol_rel * np.abs(off)))
                low = np.abs(lev_in - m_rest)
                good = (closed & (n_l >= 2) & (n_r >= 2) & (n_in >= min_len)
                        & ~(inside[None, :, :] & taken[act][:, None, :]).any(axis=2)
                        & np.isfinite(cost) & (np.sign(lev_in - m_rest) == np.sign(off))
                        & (low >= min_step) & (low >= z_min * se))
            found = good.any(axis=1)
            active[act[~found]] = False
            # the best fit of each row: the first window of least cost among the good ones
            best = np.argmin(np.where(good, cost, np.inf), axis=1)
            for j in np.flatnonzero(found):
                r, k = int(act[j]), int(best[j])
                a, b, o = int(first[k]), int(last[k]), float(off[j, k])
                out[int(rows[r])].append((a, b, o))
                work[r, a:b + 1] -= o
                taken[r, a:b + 1] = True
    return [sorted(o) for o in out]


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
    # the modules of each row in column order (ties in module order), rows by key: one
    # stable sort for all rows (a comparison of every module per row grew as rows x modules)
    use = np.flatnonzero((keys >= 0) & np.isfinite(col))
    order = use[np.lexsort((col[use], keys[use]))]
    cuts = np.flatnonzero(np.diff(keys[order])) + 1
    rows = [(int(keys[mem[0]]), mem) for mem in np.split(order, cuts) if len(mem)]
    # the module-to-module spread: robust spread of the differences between neighbours along
    # the rows, over sqrt(2) (seams and defects are few among the differences)
    # (twice: the second time with the stretches of the first levelled, whose edges would
    # widen the spread of a few short rows)
    level = np.zeros_like(t)
    for _ in range(2):
        tl = t - level
        diffs = np.concatenate([np.diff(tl[mem]) for _, mem in rows if len(mem) > 1] or [np.zeros(0)])
        diffs = diffs[np.isfinite(diffs)]
        sigma = scaled_mad(diffs) / np.sqrt(2.0) if diffs.size >= 10 else 0.0
        # rows of one length are fitted together
        fits: dict[int, list[tuple[int, int, float]]] = {}
        by_len: dict[int, list[int]] = {}
        for i, (_k, mem) in enumerate(rows):
            by_len.setdefault(len(mem), []).append(i)
        for members in by_len.values():
            for i, f in zip(members, _closed_stretches_rows(np.stack([t[rows[i][1]] for i in members]), cfg, sigma)):
                fits[i] = f
        found = []  # (row key, modules, offset, the modules either side)
        w = int(cfg["window_modules"])
        for i, (k, mem) in enumerate(rows):
            for first, last, offset in fits[i]:
                sides = np.concatenate([mem[max(first - w, 0):first], mem[last + 1:last + 1 + w]])
                found.append((int(k), mem[first:last + 1], offset, sides))
        level = np.zeros_like(t)
        for _k, seg, off, _s in found:
            level[seg] = off
    tol_abs, tol_rel = float(cfg["match_abs_k"]), float(cfg["match_rel"])
    in_string = bool(cfg["level_cold_in_string"])
    out = []
    for j, (k, seg, off, sides) in enumerate(found):
        if sid is not None and len(set(sid[seg]) - {""}) > 1:  # modules without a string do not count
            out.append(Stretch(seg, off, "strings"))
            continue
        cols = set(col[seg].tolist())
        for j2, (k2, seg2, off2, _s2) in enumerate(found):
            if (j2 != j and k2 != k and table[seg2[0]] == table[seg[0]] and np.sign(off2) == np.sign(off)
                    and abs(off2 - off) <= tol_abs + tol_rel * max(abs(off), abs(off2))
                    and len(cols & set(col[seg2].tolist())) >= 0.5 * len(cols)):
                out.append(Stretch(seg, off, "rows"))
                break
        else:
            if in_string and sid is not None and off < 0 and _inside_one_string(sid, seg, sides):
                out.append(Stretch(seg, off, "cold"))
    log.debug("seams: %d closed stretches, %d levelled", len(found), len(out))
    return out


def _inside_one_string(sid: np.ndarray, seg: np.ndarray, sides: np.ndarray) -> bool:
    """Whether a stretch and the modules either side of it all belong to one known string."""
    names = set(sid[seg].tolist()) | set(sid[sides].tolist())
    return len(names) == 1 and "" not in names


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
    # the last step of measuring: what the measuring freed goes back to the system before
    # the pattern tests build their (modules x cells) arrays
    release_freed_memory()
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
