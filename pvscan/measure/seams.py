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
   and the row is fitted again for more. Over the very columns of a stretch found in one
   row, the table's other rows are tested once more without the sides' agreement (a seam
   crosses the rows, and the spread can make one row's sides disagree), at ``repeat_z``
   standard errors (one test at given columns, not a search);
3. the stretch is an artefact, and is levelled by its offset, when it covers modules of
   more than one string, or when another row of its table has a stretch over at least
   half of the same columns at a similar level (a seam or a reflection crosses rows; a
   defect of one string does not repeat in the row beside it), or (``level_cold_in_string``)
   when it is colder than the modules either side and they and it belong to one string (a
   string's faults only warm its modules: an open string all of them, PID from its negative
   end; so a string cooler in its middle than at both sides is the image's doing, such as two
   seams over a one-row table whose string opened). A stretch over several strings is not
   levelled (``spare_whole_string_runs``) when it holds one string's whole run of its row
   standing above the stretch's other modules by more than the match tolerance: an open
   string beside a reflection or seam that reached over the next string's modules.

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
        table has a matching stretch), ``"cold"`` (colder than the same string either side) or
        ``"edge"`` (it runs to its table's end, where every row of the table steps at one column).
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
    found += _repeated_in_rows(rows, t - level, col, table, found, cfg, sigma)
    tol_abs, tol_rel = float(cfg["match_abs_k"]), float(cfg["match_rel"])
    in_string = bool(cfg["level_cold_in_string"])
    spare_runs = bool(cfg["spare_whole_string_runs"])
    row_of = dict(rows)
    out = []
    for j, (k, seg, off, sides) in enumerate(found):
        if sid is not None and len(set(sid[seg]) - {""}) > 1:  # modules without a string do not count
            if not (spare_runs and _whole_string_run_stands_out(sid, seg, row_of[k], t, cfg)):
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
    if bool(cfg["level_table_edges"]):
        out += _table_edges(rows, t, col, table, sid, out, cfg, sigma)
    log.debug("seams: %d closed stretches, %d levelled", len(found), len(out))
    return out


def _repeated_in_rows(rows: list[tuple[int, np.ndarray]], tl: np.ndarray, col: np.ndarray, table: np.ndarray,
                      found: list[tuple[int, np.ndarray, float, np.ndarray]], cfg: Mapping[str, Any],
                      sigma: float) -> list[tuple[int, np.ndarray, float, np.ndarray]]:
    """Stretches of the other rows of a table over the columns of a stretch found in one row.

    A seam or a reflection that crosses the rows of a table steps each of them over about the
    same columns; the module-to-module spread can make one row's two sides disagree by more
    than ``match_abs_k`` + ``match_rel`` x the offset (a median of three modules carries
    about 0.4 K of a 0.3 K spread), so that row alone is not a closed stretch. Over the very
    columns of a stretch found in another row of its table, a row counts with the closed
    test's other bars: its offset (median inside minus the median of the rest of the row,
    ``tl`` with the stretches found levelled [degC]) matches the found one's within that
    tolerance, reaches ``min_step_k`` and ``repeat_z`` standard errors (inside median at the
    order statistic nearer the outside level; one test at given columns, where ``seam_z``
    guards a search over every window), and each side (the ``window_modules``
    modules, two or more) steps by at least half the offset the same way. The rows are then
    levelled together (reason ``rows``). Rows that hold a found stretch over those columns
    are not looked at again.
    """
    w = int(cfg["window_modules"])
    min_len = int(cfg["min_modules"])
    min_step = float(cfg["min_step_k"])
    tol_abs, tol_rel = float(cfg["match_abs_k"]), float(cfg["match_rel"])
    z_min = float(cfg["repeat_z"])
    by_table: dict[str, list[tuple[int, np.ndarray]]] = {}
    for k, mem in rows:
        if table[mem[0]]:
            by_table.setdefault(str(table[mem[0]]), []).append((k, mem))
    taken = np.zeros(tl.size, bool)
    for _k, seg, _o, _s in found:
        taken[seg] = True
    out: list[tuple[int, np.ndarray, float, np.ndarray]] = []
    for k, seg, off, _s in found:
        cols = col[seg]
        for k2, mem in by_table.get(str(table[seg[0]]), []):
            if k2 == k:
                continue
            inside = np.isin(col[mem], cols)
            pos = np.flatnonzero(inside)
            if pos.size < min_len or taken[mem[inside]].any() or pos.size != pos[-1] - pos[0] + 1:
                continue
            a, b = int(pos[0]), int(pos[-1])
            left, right = mem[max(a - w, 0):a], mem[b + 1:b + 1 + w]
            v_in, v_rest = tl[mem[inside]], tl[mem[~inside]]
            v_l, v_r = tl[left], tl[right]
            v_in, v_rest, v_l, v_r = (v[np.isfinite(v)] for v in (v_in, v_rest, v_l, v_r))
            if v_in.size < min_len or v_l.size < 2 or v_r.size < 2 or v_rest.size < 2:
                continue
            m_in, m_rest = float(np.median(v_in)), float(np.median(v_rest))
            off2 = m_in - m_rest
            srt = np.sort(v_in)
            lev_in = srt[(v_in.size - 1) // 2] if off2 >= 0 else srt[v_in.size // 2]
            low = abs(lev_in - m_rest)
            se = max(sigma, 1e-9) * np.sqrt(1.0 / v_in.size + 1.0 / v_rest.size)
            steps = [m_in - float(np.median(v_l)), m_in - float(np.median(v_r))]
            if (np.sign(off2) == np.sign(off) and abs(off2 - off) <= tol_abs + tol_rel * max(abs(off), abs(off2))
                    and np.sign(lev_in - m_rest) == np.sign(off2) and low >= min_step and low >= z_min * se
                    and all(np.sign(d) == np.sign(off2) and abs(d) >= 0.5 * abs(off2) for d in steps)):
                out.append((int(k2), mem[a:b + 1], off2, np.concatenate([left, right])))
                taken[mem[a:b + 1]] = True
    return out


def _table_edges(rows: list[tuple[int, np.ndarray]], t: np.ndarray, col: np.ndarray, table: np.ndarray,
                 sid: np.ndarray | None, levelled: list[Stretch], cfg: Mapping[str, Any],
                 sigma: float) -> list[Stretch]:
    """Stretches that run to a table's end and are a mosaic seam crossing the whole table.

    A seam that reaches the end of a table steps every row of it at the same column by about
    the same amount; a row's stretch from that column to the table's end is then not closed,
    and :func:`find_stretches` leaves it. It is levelled here when, at one boundary column
    ``c`` (at least ``min_modules`` modules from the table's end), every row of the table
    (two or more) steps the same way by at least ``min_step_k``, the steps agree within
    ``match_abs_k`` + ``match_rel`` x the step, their mean reaches ``seam_z`` standard errors
    (end side against the ``window_modules`` modules beyond the boundary, over the rows), at
    least one row is plain (beyond the boundary it stays at the level of the rest of its row,
    within the same tolerance: the step is not the edge of a defect there), the end sides hold
    modules of more than one string and no string in two rows' end sides (a string laid along
    one row and back along the next, whose fault steps both rows at one column, is not
    levelled), and the boundary cuts a string standing ``min_step_k`` or more above the rest of
    its row beyond the boundary (a warm string, open or PID, split into two levels by the seam:
    only then is the string's own test misled; levelling every seam edge would leave the module
    the seam line crosses half at each level, a false finding). Strings must be known. Of
    several such boundaries the best fit is taken (least absolute deviation of the plain rows
    from one level on the end side and one on the rest); each row's end side is
    levelled by the mean step of the rows.
    """
    if sid is None:
        return []
    w = int(cfg["window_modules"])
    min_len = int(cfg["min_modules"])
    min_step = float(cfg["min_step_k"])
    tol_abs, tol_rel = float(cfg["match_abs_k"]), float(cfg["match_rel"])
    z_min = float(cfg["seam_z"])
    level = np.zeros_like(t)
    for st in levelled:
        level[st.modules] = st.offset_k
    tl = t - level
    by_table: dict[str, list[np.ndarray]] = {}
    for _k, mem in rows:
        if table[mem[0]]:
            by_table.setdefault(str(table[mem[0]]), []).append(mem)
    out: list[Stretch] = []
    for mems in by_table.values():
        if len(mems) < 2:
            continue
        cols = np.unique(np.concatenate([col[m] for m in mems]))
        best: tuple[float, list[tuple[np.ndarray, float]]] | None = None
        for end in (0, 1):
            js = np.arange(min_len, len(cols) - w + 1)
            if not js.size:
                continue
            cands = cols[js] if end == 0 else cols[len(cols) - js]
            # each row's statistics at every boundary at once (the boundaries along the first
            # axis): the modules on the end side, beyond the boundary (window) and the rest
            per_row = [_row_sides(col[mem], tl[mem], level[mem] != 0, cands, end, w) for mem in mems]
            for jj, c in enumerate(cands):
                steps, plain = [], False
                for rs in per_row:
                    if rs.n_side[jj] < min_len or rs.levelled[jj] or rs.n_beyond[jj] < 2:
                        break
                    d = float(rs.med_side[jj] - rs.med_beyond[jj])
                    if not np.isfinite(d):
                        break
                    steps.append(d)
                    plain |= bool(abs(float(rs.med_beyond[jj]) - float(rs.med_rest[jj])) <= tol_abs + tol_rel * abs(d))
                else:
                    st_arr = np.asarray(steps)
                    mean = float(st_arr.mean())
                    if not (plain and (np.sign(st_arr) == np.sign(mean)).all()
                            and (np.abs(st_arr) >= min_step).all()
                            and np.ptp(st_arr) <= tol_abs + tol_rel * abs(mean)):
                        continue
                    sides = [mem[col[mem] < c] if end == 0 else mem[col[mem] >= c] for mem in mems]
                    n_side = min(len(sd) for sd in sides)
                    se = max(sigma, 1e-9) * np.sqrt(1.0 / n_side + 1.0 / w) / np.sqrt(len(steps))
                    strings_of = [set(sid[sd].tolist()) - {""} for sd in sides]
                    strings = set().union(*strings_of)
                    if not (abs(mean) >= z_min * se and len(strings) > 1
                            and sum(len(p) for p in strings_of) == len(strings)):
                        continue
                    if not any(_warm_string_cut(mem, col[mem], tl, sid, c, end, min_step) for mem in mems):
                        continue
                    cost = _plain_rows_cost(mems, col, tl, c, end, w, tol_abs, tol_rel)
                    if best is None or cost < best[0]:
                        best = (cost, [(sd, mean) for sd in sides])
        if best is not None:
            out += [Stretch(sd, off, "edge") for sd, off in best[1]]
    return out


@dataclass(frozen=True)
class _Sides:
    """One table row's statistics at each candidate boundary of :func:`_table_edges`."""

    n_side: np.ndarray        # modules on the end side
    levelled: np.ndarray      # an end-side module already levelled by another stretch
    n_beyond: np.ndarray      # finite temperatures in the window beyond the boundary
    med_side: np.ndarray      # median of the end side [degC]
    med_beyond: np.ndarray    # median of the window beyond the boundary [degC]
    med_rest: np.ndarray      # median of the row beyond the boundary [degC]


def _side_masks(cm: np.ndarray, cands: np.ndarray, end: int, w: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(boundaries x modules) masks of the end side, the window beyond it and the rest of a row."""
    c = cands[:, None]
    x = cm[None, :]
    if end == 0:
        return x < c, (x >= c) & (x < c + w), x >= c
    return x >= c, (x < c) & (x >= c - w), x < c


def _median_over(v: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Median of ``v`` over each line of ``mask``, ignoring NaN (NaN where none) [unit of v]:
    the mean of the lower and the upper median, as numpy's median takes it."""
    lo, hi, cnt = _masked_median(v[None, :], mask)
    return np.where(cnt[0] > 0, (lo[0] + hi[0]) / 2.0, np.nan)


def _row_sides(cm: np.ndarray, v: np.ndarray, lev: np.ndarray, cands: np.ndarray, end: int, w: int) -> _Sides:
    side, beyond, rest = _side_masks(cm, cands, end, w)
    return _Sides(n_side=side.sum(axis=1), levelled=(side & lev[None, :]).any(axis=1),
                  n_beyond=(beyond & np.isfinite(v)[None, :]).sum(axis=1),
                  med_side=_median_over(v, side), med_beyond=_median_over(v, beyond),
                  med_rest=_median_over(v, rest))


def _plain_rows_cost(mems: list[np.ndarray], col: np.ndarray, tl: np.ndarray, c: float, end: int, w: int,
                     tol_abs: float, tol_rel: float) -> float:
    """The fit of the boundary at column ``c`` on the table's plain rows: each such row at two
    levels, the end side's and the rest's, least absolute deviation [K]. A row is plain when
    beyond the boundary it stays at the level of the rest of its row (within the tolerance of
    the step)."""
    cost = 0.0
    for mem in mems:
        cm, v = col[mem], tl[mem]
        side = mem[cm < c] if end == 0 else mem[cm >= c]
        beyond = v[(cm >= c) & (cm < c + w)] if end == 0 else v[(cm < c) & (cm >= c - w)]
        rest = v[cm >= c] if end == 0 else v[cm < c]
        d = float(np.nanmedian(tl[side]) - np.nanmedian(beyond))
        if abs(float(np.nanmedian(beyond)) - float(np.nanmedian(rest))) <= tol_abs + tol_rel * abs(d):
            cost += float(np.nansum(np.abs(tl[side] - np.nanmedian(tl[side])))
                          + np.nansum(np.abs(rest - np.nanmedian(rest))))
    return cost


def _warm_string_cut(mem: np.ndarray, cm: np.ndarray, tl: np.ndarray, sid: np.ndarray, c: float, end: int,
                     min_step: float) -> bool:
    """Whether the boundary at column ``c`` cuts a string of this row whose part beyond it
    (away from the table's end) stands ``min_step`` [K] or more above the rest of the row: a
    warm string (open, PID) that a seam over the table's end would split into two levels. The
    rest is the row's other strings on the same side of the boundary (the end side is the seam's)."""
    side = cm < c if end == 0 else cm >= c
    if not side.any() or side.all():
        return False
    inner = int(np.flatnonzero(side)[-1]) if end == 0 else int(np.flatnonzero(side)[0])
    outer = inner + 1 if end == 0 else inner - 1
    name = sid[mem[inner]]
    if not name or sid[mem[outer]] != name:
        return False
    own = sid[mem] == name
    part, others = tl[mem[own & ~side]], tl[mem[~own & ~side]]
    if np.isfinite(part).sum() < 1 or np.isfinite(others).sum() < 2:
        return False
    return bool(np.nanmedian(part) - np.nanmedian(others) >= min_step)


def _whole_string_run_stands_out(sid: np.ndarray, seg: np.ndarray, row: np.ndarray, t: np.ndarray,
                                 cfg: Mapping[str, Any]) -> bool:
    """Whether a stretch over several strings holds one string's whole run of its row standing above the rest.

    An open string warms every module of its string by about the same amount; a reflection or a
    seam that also covers a neighbouring string's modules makes the closed stretch reach over both
    strings, and levelling it as an artefact would erase the open string. True when the stretch
    holds every module of one string in the row (``min_modules`` or more) and that run's median
    excess over the rest of the row exceeds the excess of the stretch's other modules by more
    than ``match_abs_k`` + ``match_rel`` x the larger of the two (the tolerance within which two
    parts of one artefact agree). ``row``: the row's modules; ``t``: module medians [degC].
    """
    rest = np.setdiff1d(row, seg)
    rest_t = t[rest][np.isfinite(t[rest])]
    if rest_t.size == 0:
        return False
    base = float(np.median(rest_t))
    in_seg = np.isin(row, seg)
    tol_abs, tol_rel = float(cfg["match_abs_k"]), float(cfg["match_rel"])
    for name in set(sid[seg].tolist()) - {""}:
        run = row[sid[row] == name]
        part = seg[sid[seg] == name]
        others = seg[sid[seg] != name]
        if len(part) < int(cfg["min_modules"]) or not in_seg[sid[row] == name].all() or not len(others):
            continue
        part_t, other_t = t[part][np.isfinite(t[part])], t[others][np.isfinite(t[others])]
        if len(run) != len(part) or part_t.size == 0 or other_t.size == 0:
            continue
        excess, other = float(np.median(part_t)) - base, float(np.median(other_t)) - base
        if excess - other > tol_abs + tol_rel * max(abs(excess), abs(other)):
            return True
    return False


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
