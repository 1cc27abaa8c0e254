"""The lines between a table's module rows, per table and per column.

A table of several module rows shows the frames between its rows as cool lines across it, as
a row shows the frames between its modules (common practice: frames conduct heat away from the
glass and read cooler in thermal images of sunlit modules). :func:`_row_lines` measures them
over a lattice; :func:`_columns_run` over each column alone, to tell the ground between two
tables of a row (no row lines, whatever its temperature) from a column of modules.
"""
from __future__ import annotations

import math

import numpy as np

__all__: list[str] = []


def _profile(s: np.ndarray, w: np.ndarray, t: np.ndarray, n: int, m: int, size_s: float, pitch_w: float,
             gap_s: float, gsd: float) -> tuple[np.ndarray, float]:
    """Mean temperature across a lattice of ``m`` rows of pitch ``pitch_w`` [m], over its
    ``n`` columns, in bins of half a pixel from its origin (NaN where a bin is empty); with the
    bin size [m]."""
    inside = (s > 0) & (s < n * size_s + (n - 1) * gap_s) & np.isfinite(t)
    bin_m = gsd / 2
    nb = int(math.ceil((m * pitch_w) / bin_m)) + 1
    k = np.floor(w[inside] / bin_m).astype(int)
    ok = (k >= 0) & (k < nb)
    sums = np.bincount(k[ok], weights=t[inside][ok], minlength=nb)
    cnt = np.bincount(k[ok], minlength=nb)
    return np.where(cnt > 0, sums / np.maximum(cnt, 1), np.nan), bin_m


def _row_line_offset(s: np.ndarray, w: np.ndarray, t: np.ndarray, n: int, m: int, size_s: float, size_w: float,
                     gap_s: float, gap_w: float, gsd: float, shift_m: float) -> float:
    """How far [m] the lines between a lattice's rows lie from where the lattice puts them:
    the median over the lines of the distance from each line's middle to the coolest bin
    within ``shift_m`` of it (the profile across, :func:`_profile`, a line's dip a pixel or
    two wide). A lattice a part of a row off across its table still finds a cool bin near each
    line, and so a row-line contrast (:func:`_row_lines`), but not at the line's place; NaN
    for a table of one row. ``s, w`` are the samples' coordinates from the lattice's origin [m].
    """
    if m < 2:
        return math.nan
    pitch_w = size_w + gap_w
    prof, bin_m = _profile(s, w, t, n, m, size_s, pitch_w, gap_s, gsd)
    reach = max(1, int(round(shift_m / bin_m)))
    off = []
    for r in range(1, m):
        c = (r * pitch_w - 0.5 * gap_w) / bin_m - 0.5  # the line's middle in bins (bin j spans j..j+1)
        j0, j1 = int(max(0, round(c) - reach)), int(min(prof.size - 1, round(c) + reach))
        seg = prof[j0:j1 + 1]
        if j1 < j0 or not np.isfinite(seg).any():
            continue
        off.append((j0 + int(np.nanargmin(seg)) - c) * bin_m)
    return float(np.median(np.abs(off))) if off else math.nan


def _row_lines(s: np.ndarray, w: np.ndarray, t: np.ndarray, n: int, m: int, size_s: float, size_w: float,
               gap_s: float, gap_w: float, gsd: float, shift_m: float, weakest: bool = False) -> float:
    """Median (``weakest``: smallest) contrast of the lines between a table's module rows [K]:
    the glass half a row pitch either side (an empty bin there taken from its neighbours; the
    cooler of the two: a slope is not a line) against the coolest bin within ``shift_m`` of each line;
    NaN for a table of one row. ``s, w`` are the samples' coordinates from the lattice's
    origin [m]."""
    if m < 2:
        return math.nan
    pitch_w = size_w + gap_w
    prof, bin_m = _profile(s, w, t, n, m, size_s, pitch_w, gap_s, gsd)
    nb = prof.size
    reach = max(1, int(round(shift_m / bin_m)))
    out = []
    for r in range(1, m):
        c = (r * pitch_w - 0.5 * gap_w) / bin_m
        j0, j1 = int(max(0, round(c) - reach)), int(min(nb - 1, round(c) + reach))
        jl, jh = int(round(c - 0.5 * pitch_w / bin_m)), int(round(c + 0.5 * pitch_w / bin_m))
        if j1 < j0 or jl < 0 or jh >= nb:
            continue
        line = np.nanmin(prof[j0:j1 + 1]) if np.isfinite(prof[j0:j1 + 1]).any() else math.nan
        # each side's bin, or where it is empty the mean of its two neighbours (a table along
        # the pixel grid leaves every other bin empty, and one empty bin must not leave the
        # other side alone to decide)
        sides = []
        for j in (jl, jh):
            v = prof[j] if np.isfinite(prof[j]) else (
                np.nanmean(prof[max(0, j - 1):j + 2]) if np.isfinite(prof[max(0, j - 1):j + 2]).any() else math.nan)
            if np.isfinite(v):
                sides.append(float(v))
        side = min(sides) if sides else math.nan
        out.append(side - line)
    v = np.array(out, float)
    v = v[np.isfinite(v)]
    if not v.size:
        return math.nan
    return float(v.min() if weakest else np.median(v))


def _columns_run(s: np.ndarray, w: np.ndarray, t: np.ndarray, n: int, m: int, size_s: float, size_w: float,
                 gap_s: float, gap_w: float, gsd: float, settings: dict, centre_col: float
                 ) -> tuple[int, int] | None:
    """The run of a lattice's columns that are modules, when some inside it are not; None when
    every column is.

    Each column of a table of several rows shows the lines between its rows (:func:`_row_lines`
    over the column alone); the ground between two tables of a row, about a module pitch wide
    (common practice: tables stand about a metre apart), does not, whatever its temperature.
    A column whose row-line contrast is under ``dip_fraction`` of the columns' median is not a
    module; of the runs of the others, the one holding ``centre_col`` (the candidate's centre,
    in columns from the lattice's start), else the longest. ``s, w`` are the samples'
    coordinates from the lattice's origin [m].
    """
    pitch = size_s + gap_s
    shift = float(settings["line_shift_m"])
    inside = (s >= 0) & (s < n * pitch) & (w > -size_w) & (w < m * (size_w + gap_w) + size_w)
    s_in, w_in, t_in = s[inside], w[inside], t[inside]
    col = np.floor(s_in / pitch).astype(int)
    order = np.argsort(col, kind="stable")
    bounds = np.searchsorted(col[order], np.arange(n + 1))
    lines = np.full(n, np.nan)
    for c in range(n):
        k = order[bounds[c]:bounds[c + 1]]
        if k.size:
            lines[c] = _row_lines(s_in[k] - c * pitch, w_in[k], t_in[k], 1, m, size_s, size_w, gap_s, gap_w, gsd,
                                  shift)
    if not np.isfinite(lines).any():
        return None
    ok = ~(lines < float(settings["dip_fraction"]) * float(np.nanmedian(lines)))  # NaN: no evidence, kept
    if ok.all() or not ok.any():
        return None
    runs, a = [], None
    for c in range(n + 1):
        if c < n and ok[c]:
            a = c if a is None else a
        elif a is not None:
            runs.append((a, c - 1))
            a = None
    j = int(np.clip(math.floor(centre_col), 0, n - 1))
    holding = [r for r in runs if r[0] <= j <= r[1]]
    return holding[0] if holding else max(runs, key=lambda r: r[1] - r[0])
