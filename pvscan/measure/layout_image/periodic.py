"""A table's extent from the periodic frame lines of its modules.

Between two modules of a row lies a gap and two module frames, cooler than the glass in any
contrast with the ground (the frame conducts heat away; common practice: frames show as
cool lines in thermal images of sunlit modules). Along the table's axis these lines repeat
with the module pitch; ground and shadows beside the table have no such comb. So:

1. the samples are binned into a grid in the table's frame ``(w, s)``;
2. the phase of the comb along ``s`` is the one whose lines are coolest against the warmer
   side half a pitch away (the profile averaged over the table's inner rows);
3. per ``w`` row of bins the comb's contrast (glass between the lines minus the lines) is
   measured: glass rows show it, ground and shadow rows do not; the table's rows are the run
   above half the contrast of the centre, its edges at the half-way crossings (step 5);
4. along ``s``, each line is looked for within ``line_shift_m`` of its place on the comb
   (a mosaic seam shows part of a table shifted); the table runs over the lines whose
   contrast is at least ``dip_fraction`` of the median, and one more line at either end at
   half that when it sits on the lattice (a table's end is one frame, not two and a gap);
   the lattice's phase is the median offset of the lines between modules from the datasheet
   pitch (their dips are symmetric; an end's leans toward the glass);
5. across, of the rows' comb contrast at the lines' places and at each row's coolest bin near
   them (rows a seam shows shifted), the extent nearer a whole number of module rows is kept
   (the second may join a shadow's comb of light through the module gaps).
"""
from __future__ import annotations

import math

import numpy as np

__all__ = ["comb_extent"]


def _grid(s: np.ndarray, w: np.ndarray, t: np.ndarray, s_range: tuple[float, float],
          w_range: tuple[float, float], bin_m: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    ns = int(math.ceil((s_range[1] - s_range[0]) / bin_m))
    nw = int(math.ceil((w_range[1] - w_range[0]) / bin_m))
    i = np.floor((w - w_range[0]) / bin_m).astype(int)
    j = np.floor((s - s_range[0]) / bin_m).astype(int)
    ok = (i >= 0) & (i < nw) & (j >= 0) & (j < ns) & np.isfinite(t)
    k = i[ok] * ns + j[ok]
    sums = np.bincount(k, weights=t[ok], minlength=nw * ns)
    cnt = np.bincount(k, minlength=nw * ns)
    grid = np.where(cnt > 0, sums / np.maximum(cnt, 1), np.nan).reshape(nw, ns)
    sc = s_range[0] + (np.arange(ns) + 0.5) * bin_m
    wc = w_range[0] + (np.arange(nw) + 0.5) * bin_m
    return grid, sc, wc


def _fill_cols(grid: np.ndarray) -> np.ndarray:
    """Empty bins (an axis-aligned table leaves every other bin empty) from their neighbours:
    three passes, each filling a NaN bin with the mean of its four neighbours that hold a
    value (rows and columns wrap around at the grid's edges; a bin without any stays NaN)."""
    g = grid.copy()
    for _ in range(3):
        bad = np.isnan(g)
        if not bad.any():
            break
        p = np.pad(g, 1, mode="wrap")
        total = np.zeros(g.shape)
        count = np.zeros(g.shape)
        # left, right, up, down neighbours, summed in this order
        for v in (p[1:-1, :-2], p[1:-1, 2:], p[:-2, 1:-1], p[2:, 1:-1]):
            have = ~np.isnan(v)
            total += np.where(have, v, 0.0)
            count += have
        with np.errstate(invalid="ignore", divide="ignore"):
            g[bad] = total[bad] / count[bad]
    return g


def _local_lines(dip: np.ndarray, lines: np.ndarray, reach: int) -> tuple[np.ndarray, np.ndarray]:
    """Position [bins, sub-bin by a parabola through the peak] and depth of each line's deepest
    dip within ``reach`` bins of its place on the comb."""
    ns = dip.size
    pos = np.empty(lines.size)
    val = np.empty(lines.size)
    for i, p in enumerate(lines):
        j0 = int(np.clip(round(p) - reach, 0, ns - 1))
        j1 = int(np.clip(round(p) + reach, 0, ns - 1))
        j = j0 + int(np.argmax(dip[j0:j1 + 1]))
        off = 0.0
        if 0 < j < ns - 1:
            y0, y1, y2 = dip[j - 1], dip[j], dip[j + 1]
            den = y0 - 2.0 * y1 + y2
            if den < 0:
                off = float(np.clip(0.5 * (y0 - y2) / den, -0.5, 0.5))
        pos[i], val[i] = j + off, dip[j]
    return pos, val


def comb_extent(s: np.ndarray, w: np.ndarray, t: np.ndarray, s_range: tuple[float, float],
                w_range: tuple[float, float], w_inner: tuple[float, float], pitch_s: float, gsd: float,
                dip_fraction: float, close_m: float, line_shift_m: float,
                across_lattice: tuple[float, float] | None = None, glass_tol_k: float = math.inf,
                ground_c: float = math.nan
                ) -> tuple[float, float, float, float, float, float] | None:
    """Table extent in its frame from the comb of frame lines along its axis.

    Parameters
    ----------
    s, w : ndarray
        Sample coordinates along and across the table [m].
    t : ndarray
        Sample temperatures [degC] (NaN = nodata).
    s_range, w_range : tuple of float
        Search window [m].
    w_inner : tuple of float
        Rows surely on the table (for the phase) [m].
    pitch_s : float
        Module pitch along the axis, module plus gap [m].
    gsd : float
        Pixel size [m].
    dip_fraction : float
        A line counts when its contrast is at least this fraction of the median [-].
    close_m : float
        Gaps in the rows' comb contrast up to this are row gaps, not the table's edge [m].
    line_shift_m : float
        Each line is looked for this far either side of its place on the comb (a mosaic seam
        shows part of a table shifted) [m].
    across_lattice : (pitch_w, gap_w), optional
        Module pitch and gap across the table [m]: of the rows' extent at the lines' places
        and at each row's own line places, the one nearer a whole number of module rows.
    glass_tol_k : float, optional
        A line missing between two pairs of regular lines two pitches apart, the modules
        either side within this of the glass level, is a line a mosaic seam skipped (the
        table goes on). A module whose middle half is further than this from the glass level of the
        table's modules and nearer the ground's level is the ground between this table and
        the next one of its row (tables stand about a pitch apart), not a module: the table
        ends there (the run of lines holding the window's centre stops at it) [K].
    ground_c : float, optional
        The ground's level around the table [degC]: an end module nearer it than the glass
        level (and off the glass level by more than ``glass_tol_k``) is ground; without it
        (NaN) no end module is dropped.

    Returns
    -------
    (s_lo, s_hi, w_lo, w_hi, contrast_k, row_contrast_k) or None
        Edges [m] (the first and last lines along s; the half-way crossings of the comb
        contrast across), the median line contrast [K] and the median contrast of the glass
        between the lines against the lines over the inner rows [K] (small for a comb of
        twice the module pitch: its midpoints are lines too); None without a comb.
    """
    bin_m = gsd / 2
    with np.errstate(invalid="ignore"):
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            grid, sc, wc = _grid(s, w, t, s_range, w_range, bin_m)
            grid = _fill_cols(grid)
            inner = (wc >= w_inner[0]) & (wc <= w_inner[1])
            if inner.sum() < 2:
                return None
            prof = np.nanmedian(grid[inner], axis=0)
            if np.isnan(prof).all():
                return None
            prof = np.where(np.isnan(prof), np.nanmedian(prof), prof)
            period = pitch_s / bin_m
            half = int(round(period / 2))
            ns = prof.size
            # comb response: line at j, glass half a pitch either side
            jj = np.arange(ns)
            lo_j, hi_j = np.clip(jj - half, 0, ns - 1), np.clip(jj + half, 0, ns - 1)
            # against the warmer side: at a table's end the other side is ground
            dip = np.maximum(prof[lo_j], prof[hi_j]) - prof
            # the phase on the lines between modules: narrow, with glass a quarter pitch either
            # side (a table's end against warmer ground is a dip against the ground over half a
            # pitch, the ground between two tables about a pitch apart a dip one pitch wide),
            # and deeper than the line half a pitch away (the middle of a half-cut module)
            quarter = max(1, int(round(period / 4)))
            sym = np.minimum(np.minimum(prof[np.clip(jj - quarter, 0, ns - 1)],
                                        prof[np.clip(jj + quarter, 0, ns - 1)]) - prof, dip)
            n_phase = int(round(period))
            if n_phase < 3:
                return None
            best, phase = -np.inf, 0.0
            for p in range(n_phase):
                idx = np.round(p + np.arange(0, ns, period)).astype(int)
                idx = idx[idx < ns]
                sc_p = float(np.sort(sym[idx])[::-1][: max(2, idx.size // 2)].mean())
                if sc_p > best:
                    best, phase = sc_p, float(p)
            if best <= 0:
                return None
            k_all = np.arange(-1, int(ns / period) + 2)
            lines = phase + k_all * period
            lines = lines[(lines >= 0) & (lines < ns)]
            li = np.clip(np.round(lines).astype(int), 0, ns - 1)
            # each line where its own dip is deepest within line_shift_m (at most a quarter
            # pitch): a mosaic seam that shows part of the table shifted by a few centimetres
            # moves its lines off the common phase
            reach = int(max(0, round(min(line_shift_m / bin_m, period / 4))))
            pos, d = _local_lines(dip, lines, reach)
            li = np.clip(np.round(pos).astype(int), 0, ns - 1)
            med = float(np.median(d[d > 0])) if (d > 0).any() else 0.0
            if med <= 0:
                return None
            on = d >= dip_fraction * med
            # the run of lines holding the window's centre
            centre = int(np.argmin(np.abs(sc[li] - 0.5 * (s_range[0] + s_range[1]))))
            if not on[centre]:
                cand = np.flatnonzero(on)
                if cand.size == 0:
                    return None
                centre = int(cand[np.argmin(np.abs(cand - centre))])

            # the middle half of the module between lines j0 and j1 [degC]
            def middle(j0: int, j1: int) -> float:
                q = 0.25 * (pos[j1] - pos[j0])
                m0, m1 = int(np.clip(round(pos[j0] + q), 0, ns - 1)), int(np.clip(round(pos[j1] - q), 0, ns - 1))
                return float(np.median(prof[m0:m1 + 1]))

            pairs = np.flatnonzero(on[:-1] & on[1:])
            glass_c = float(np.median([middle(i, i + 1) for i in pairs.tolist()])) if pairs.size else math.nan
            # one line a mosaic seam skipped (the seam showed the table shifted by about a frame,
            # a gap and a frame): two regular lines between modules either side (not a table's
            # end), two pitches apart, the glass level between
            run_on = on.copy()
            regular = on & (d <= 2.0 * med)
            for i in range(2, lines.size - 2):
                if on[i] or not (regular[i - 2] and regular[i - 1] and regular[i + 1] and regular[i + 2]):
                    continue
                if abs(pos[i + 1] - pos[i - 1] - 2 * period) > 2 * reach + 1:
                    continue
                if all(abs(middle(p, p + 1) - glass_c) <= glass_tol_k for p in (i - 1, i)):
                    run_on[i] = True
            a, b = _run_around(run_on, centre)

            # the ground between this table's end and the next table of its row (tables stand
            # about a pitch apart) looks like one more module between two lines: its middle
            # half is off the glass level and nearer the ground's
            def ground_between(j0: int, j1: int) -> bool:
                mid = middle(j0, j1)
                return abs(mid - glass_c) > glass_tol_k and abs(mid - ground_c) < abs(mid - glass_c)

            if math.isfinite(glass_tol_k) and math.isfinite(ground_c) and math.isfinite(glass_c):
                if b - a >= 3:
                    # within the run too: a window longer than the table holds the next table of
                    # the row, whose first frame is about where this table's next line would be
                    j = centre
                    while j < b and not ground_between(j, j + 1):
                        j += 1
                    b = j
                    j = centre
                    while j > a and not ground_between(j - 1, j):
                        j -= 1
                    a = j
                # at the ends, a short run too: framed by the end frames of two tables, the
                # ground between them is one module of a comb of a longer pitch (the other
                # orientation's), whose "glass" is the ground
                while b - a >= 2 and ground_between(b - 1, b):
                    b -= 1
                while b - a >= 2 and ground_between(a, a + 1):
                    a += 1
                if b - a == 1 and ground_between(a, b):
                    return None
            if b - a < 1:
                return None
            # the lattice's phase from the lines between modules (symmetric dips), not from
            # the table's ends (a glass-ground edge, whose dip leans toward the glass): the
            # median of the lines' offsets from the datasheet pitch
            k = np.arange(lines.size)

            def lattice_phase(a: int, b: int) -> float:
                inner_k = k[a + 1:b][on[a + 1:b]]
                if inner_k.size >= 2:
                    return float(np.median(pos[inner_k] - inner_k * period))
                return 0.5 * (pos[a] + pos[b] - (a + b) * period)

            phi = lattice_phase(a, b)
            # a table's end is one frame, not two and a gap: against ground at the glass
            # temperature its dip is about half a line's. One more line at either end counts
            # at half the threshold when it sits on the lattice (within a pixel)
            for side in (-1, 1):
                j = a - 1 if side < 0 else b + 1
                if 0 <= j < on.size and d[j] >= 0.5 * dip_fraction * med and \
                        abs(pos[j] - (phi + j * period)) <= 2.0 and \
                        not (math.isfinite(glass_tol_k) and math.isfinite(ground_c) and math.isfinite(glass_c)
                             and ground_between(min(j, j - side), max(j, j - side))):
                    a, b = (j, b) if side < 0 else (a, j)
            phi = lattice_phase(a, b)
            s_lo = float(s_range[0] + (phi + a * period + 0.5) * bin_m)
            s_hi = float(s_range[0] + (phi + b * period + 0.5) * bin_m)
            # across: the comb contrast per row of bins, over the lines found
            sel = li[a:b + 1]
            mids = np.clip(np.round(0.5 * (pos[a:b] + pos[a + 1:b + 1])).astype(int), 0, ns - 1)
            if mids.size == 0:
                return None
            # the rows' contrast at the lines' places; and at each row's coolest bin near the
            # line (rows of a table a seam shows shifted keep their contrast; a shadow's comb
            # of light through the module gaps beside the table may join too): of the two, the
            # extent nearer a whole number of module rows
            from scipy import ndimage as ndi

            glass_c = np.nanmedian(grid[:, mids], axis=1)
            best_w = None
            variants = [grid]
            if reach > 0:
                low = ndi.minimum_filter1d(np.where(np.isnan(grid), np.inf, grid), 2 * reach + 1, axis=1,
                                           mode="nearest")
                variants.append(np.where(np.isfinite(low), low, np.nan))
            for low in variants:
                row_c = np.nan_to_num(glass_c - np.nanmedian(low[:, sel], axis=1), nan=0.0)
                r = _rows_extent(row_c, wc, inner, close_m, bin_m, w_inner)
                if r is None:
                    continue
                w_lo, w_hi, ref = r
                miss = 0.0
                if across_lattice is not None:
                    n_w = (w_hi - w_lo + across_lattice[1]) / across_lattice[0]
                    miss = abs(n_w - round(n_w))
                if best_w is None or miss < best_w[0] - 0.05:
                    best_w = (miss, w_lo, w_hi, ref)
            if best_w is None:
                return None
            _, w_lo, w_hi, ref = best_w
    return s_lo, s_hi, w_lo, w_hi, med, ref


def _rows_extent(row_c: np.ndarray, wc: np.ndarray, inner: np.ndarray, close_m: float, bin_m: float,
                 w_inner: tuple[float, float]) -> tuple[float, float, float] | None:
    """The run of rows whose comb contrast is at least half the inner rows' (gaps up to
    ``close_m`` closed) and its half-way crossings [m]; with that reference contrast [K]."""
    from scipy import ndimage as ndi

    ref = float(np.median(row_c[inner])) if inner.any() else 0.0
    if ref <= 0:
        return None
    on_w = row_c >= 0.5 * ref
    # row gaps (a gap and two frames, ~0.1 m) do not end the table
    k_close = max(1, int(round(close_m / bin_m)))
    padded = np.pad(on_w, k_close + 1)
    on_w = ndi.binary_closing(padded, np.ones(2 * k_close + 1, bool))[k_close + 1:-(k_close + 1)]
    ci = int(np.argmin(np.abs(wc - 0.5 * (w_inner[0] + w_inner[1]))))
    if not on_w[ci]:
        return None
    a2, b2 = _run_around(on_w, ci)

    def cross(i0: int, i1: int) -> float:
        y0, y1 = row_c[i0] - 0.5 * ref, row_c[i1] - 0.5 * ref
        if y0 == y1:
            return float(0.5 * (wc[i0] + wc[i1]))
        return float(wc[i0] + (wc[i1] - wc[i0]) * y0 / (y0 - y1))

    w_lo = cross(a2, a2 - 1) if a2 > 0 else float(wc[0])
    w_hi = cross(b2, b2 + 1) if b2 < on_w.size - 1 else float(wc[-1])
    return w_lo, w_hi, ref


def _run_around(on: np.ndarray, i: int) -> tuple[int, int]:
    """First and last index of the run of True in ``on`` that holds index ``i`` (``on[i]`` True)."""
    a = i
    while a > 0 and on[a - 1]:
        a -= 1
    b = i
    while b < on.size - 1 and on[b + 1]:
        b += 1
    return a, b
