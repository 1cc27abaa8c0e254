"""Fit a regular lattice of module footprints to one table on the full-resolution ortho.

A table is a lattice: ``cols`` modules along its axis and ``rows`` across, all of one size,
with one gap. The table's rectangle from the mosaic (:mod:`.segment`) is refined on the
pixels of a window around it (a windowed read per tile; the pixels are used as a cloud of
samples ``(s, w, T)`` in the table's frame, so tiles need no mosaicking and a rotated table
gives a super-resolved edge profile):

1. **extent**: the share of glass-level samples (``|T - level| <= level_tol_k``) per
   ``gsd / 2`` bin along each axis, closed over frame lines and module gaps; the run
   holding the centre is the table;
2. **edges**: each edge is placed where the mean temperature profile across it crosses half
   way between the glass and the ground just outside it (a symmetric blur leaves a step's
   half-way point where the step is), to a fraction of a pixel;
3. **angle**: the long edges are measured in ``angle_segments`` pieces along the table and a
   straight line fitted to them by least squares; their mean slope turns the axis; steps 1-3
   run ``refine_passes`` times;
4. **lattice**: for each orientation the datasheet allows (portrait, landscape) the number
   of modules along and across is the nearest whole number of ``(extent + gap) / (module +
   gap)`` (the module's side up the slope foreshortened to ``length * cos(tilt)``); the
   orientation with the smaller misfit wins (the manifest's on a tie), and the modules share
   the measured extent evenly.

5. **rows**: a table of several module rows shows the lines between its rows as a row shows
   the lines between its modules; a lattice whose row lines are weaker than ``dip_fraction``
   of its frame-line comb, or than ``contrast_full_k``, lies on a shadow or on ground beside
   a table (a tracker's shadow shows the comb of light through the module gaps) and gets
   confidence 0 (dropped, its candidate searched again beside it).

An edge whose outside lies on nodata or beyond the ortho is *cut*: the lattice is then laid
from the other edge with the datasheet pitch, and the modules that reach past the visible
glass are kept with ``status = "cut"``; a module with too few valid pixels is ``"nodata"``.
Nothing is extrapolated beyond the ortho.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pvscan.measure.layout_image.rows import _columns_run, _row_line_offset, _row_lines
from pvscan.measure.layout_image.samples import _comb_strip, _extent, _half_crossing, _samples
from pvscan.measure.layout_image.segment import TableCandidate, _mode, glass_band

__all__ = ["TableFit", "fit_table", "facing_vector"]


def facing_vector(azimuth_deg: float) -> np.ndarray:
    """Unit vector (east, north) of a compass azimuth [deg from north, clockwise]."""
    phi = math.radians(azimuth_deg)
    return np.array([math.sin(phi), math.cos(phi)])


@dataclass
class TableFit:
    """One table's lattice in map coordinates.

    Attributes
    ----------
    origin : ndarray (2,)
        Map point of the table corner at col 1 and the upper edge (``s_lo, w_lo``) [m].
    axis, across : ndarray (2,)
        Unit vectors along the table (toward higher cols) and toward its lower edge [-].
    length_m, depth_m : float
        Extent of the lattice [m].
    rows, cols : int
    orientation : str
    module_s_m, module_w_m, gap_s_m, gap_w_m : float
        Module footprint and gaps along / across the table [m].
    confidence : float
        0..1: lattice misfit, glass share and edge contrast together.
    misfit : float
        Largest distance of the measured extents from a whole number of modules [modules].
    cut : tuple of bool
        Edges on nodata: (s_lo, s_hi, w_lo, w_hi).
    status : ndarray (rows, cols) of str
        ``ok``, ``cut`` or ``nodata`` per module (row 0 = upper edge, col 0 = s_lo).
    glass : ndarray (rows, cols)
        Share of valid pixels of each module at the glass level [-].
    rows_comb_k : float
        Contrast of the frame lines between the modules of the weakest row [K] (measured for
        a lattice laid on whole rows, :func:`_snap_rows`; NaN otherwise).
    """

    origin: np.ndarray
    axis: np.ndarray
    across: np.ndarray
    length_m: float
    depth_m: float
    rows: int
    cols: int
    orientation: str
    module_s_m: float
    module_w_m: float
    gap_s_m: float
    gap_w_m: float
    confidence: float
    misfit: float
    level_c: float
    contrast_k: float
    cut: tuple[bool, bool, bool, bool]
    status: np.ndarray = field(repr=False)
    glass: np.ndarray = field(repr=False)
    rows_comb_k: float = math.nan

    def corners(self) -> np.ndarray:
        """Module corners (rows, cols, 4, 2) [m], counter-clockwise for a right-handed frame."""
        r = np.arange(self.rows)
        c = np.arange(self.cols)
        s0 = c * (self.module_s_m + self.gap_s_m)
        w0 = r * (self.module_w_m + self.gap_w_m)
        S = np.stack([s0, s0 + self.module_s_m, s0 + self.module_s_m, s0], axis=1)  # (cols, 4)
        W = np.stack([w0, w0, w0 + self.module_w_m, w0 + self.module_w_m], axis=1)  # (rows, 4)
        S = np.broadcast_to(S[None], (self.rows, self.cols, 4))
        W = np.broadcast_to(W[:, None], (self.rows, self.cols, 4))
        x = self.origin[0] + S * self.axis[0] + W * self.across[0]
        y = self.origin[1] + S * self.axis[1] + W * self.across[1]
        return np.stack([x, y], axis=-1)


def _lattice(extent: float, mod: float, gap: float) -> tuple[int, float]:
    n = max(1, int(round((extent + gap) / (mod + gap))))
    return n, abs((extent + gap) / (mod + gap) - n)


def _size(extent: float, n: int, datasheet: float, gap: float, settings: dict) -> float:
    """Module size along one axis: the datasheet's when the measured extent agrees with it.

    A table's edges are measured through the blur and the cooler frame, so they can sit a
    centimetre or two inside the footprint; their midpoint is unbiased. Within
    ``datasheet_tol`` the datasheet size (exact to the millimetre) is laid around the
    measured centre, else the measured extent is shared evenly (a wrong datasheet or tilt).
    """
    measured = (extent - (n - 1) * gap) / n
    if abs(measured / datasheet - 1.0) <= float(settings["datasheet_tol"]):
        return datasheet
    return measured


def fit_table(orthos: Any, cand: TableCandidate, module: Any, layout: Any, settings: dict,
              fixed_axis: bool = False) -> TableFit | None:
    """Refine a table candidate and fit its module lattice (see the module docstring).

    The pixels are read around the candidate; a candidate shorter than its table (the mosaic
    saw part of it) is fitted with its comb running to the end of that window. Then, when the
    ground around the table is off the glass level by more than ``level_tol_k`` (so the comb
    stops at the ground between two tables of a row, :func:`.periodic.comb_extent`), the
    candidate is made longer by ``grow_m`` on each end beyond which glass goes on and the
    table fitted again, up to ``grow_steps`` times, while the fit gains modules (same rows,
    confidence not lower by more than ``grow_confidence_drop``).

    Parameters
    ----------
    orthos : OrthoSet
    cand : TableCandidate
    module : ModuleSpec
        ``width_m``, ``length_m`` [m].
    layout : LayoutSpec
        ``orientation`` (used on a tie), ``gap_m`` [m], ``tilt_deg``, ``azimuth_deg`` [deg].
    settings : mapping
        The ``[layout_detect]`` section.
    fixed_axis : bool, optional
        Keep the candidate's axis (the plant's, :func:`.detect.detect_layout`) instead of
        measuring the table's angle from its long edges.

    Returns
    -------
    TableFit or None
        None when no lattice fits (no glass run at the candidate's centre).
    """
    from dataclasses import replace

    fit, ends = _fit_window(orthos, cand, module, layout, settings, fixed_axis=fixed_axis)
    across_reach = None
    min_conf = float(settings["min_confidence"])
    if fit is None or fit.confidence < min_conf:
        # no table on the candidate as a whole: it may hold a table and a region beside it at
        # the glass level (a tracker row and its shadow); fit the strip of frame lines alone
        strip = _comb_strip(orthos, cand, module, layout, settings)
        if strip is not None:
            # across, the comb stays near the strip (a quarter of a module width either side:
            # the region beside it has a comb of its own)
            across_reach = 0.25 * module.width_m
            fit_s, ends_s = _fit_window(orthos, strip, module, layout, settings, across_reach, fixed_axis)
            if fit_s is not None and (fit is None or fit_s.confidence > fit.confidence):
                fit, ends, cand = fit_s, ends_s, strip
    tol = float(settings["level_tol_k"])
    stops = math.isfinite(cand.ground_c) and abs(cand.level_c - cand.ground_c) > tol
    grow = float(settings["grow_m"])
    drop = float(settings["grow_confidence_drop"])
    for _ in range(int(settings["grow_steps"]) if stops else 0):
        if fit is None or not any(ends) or any(fit.cut) or fit.confidence < min_conf:
            break
        lo, hi = grow * ends[0], grow * ends[1]
        # the grown candidate: the fitted table, longer on the ends where glass goes on
        centre = fit.origin + 0.5 * fit.length_m * fit.axis + 0.5 * fit.depth_m * fit.across
        grown = replace(cand, centre=centre + 0.5 * (hi - lo) * fit.axis, axis=fit.axis,
                        length_m=fit.length_m + lo + hi, depth_m=fit.depth_m)
        fit2, ends2 = _fit_window(orthos, grown, module, layout, settings, across_reach, fixed_axis)
        if fit2 is None or fit2.cols <= fit.cols or fit2.rows != fit.rows or fit2.confidence < fit.confidence - drop:
            break
        fit, ends = fit2, ends2
    return fit


def _fit_window(orthos: Any, cand: TableCandidate, module: Any, layout: Any, settings: dict,
                across_reach_m: float | None = None, fixed_axis: bool = False
                ) -> tuple[TableFit | None, tuple[bool, bool]]:
    """:func:`fit_table` on the pixels around one candidate; with whether glass goes on
    beyond the fitted table's start and end along its axis (the band from ``end_band_m`` to
    ``end_band_pitch`` module pitches beyond the end, over the table's middle rows, within
    ``level_tol_k`` of the glass level and nearer it than the ground's level). The comb looks
    ``comb_reach_m`` beyond the candidate across the axis, or ``across_reach_m`` [m] when given."""
    gsd = float(orthos.gsd_m)
    tol = float(settings["level_tol_k"])
    margin = float(settings["window_margin_m"])
    half = 0.5 * math.hypot(cand.length_m, cand.depth_m) + margin
    x, y, t = _samples(orthos, cand.centre, half)
    if x.size == 0:
        return None, (False, False)
    valid = np.isfinite(t)
    face = facing_vector(layout.azimuth_deg)
    centre = cand.centre.astype(float).copy()
    axis = cand.axis.astype(float).copy()
    length, depth = cand.length_m, cand.depth_m
    level = cand.level_c
    band = cand.band_c
    bin_m = gsd / 2
    close_m = float(settings["close_m"])
    clear = float(settings["edge_clear_m"])
    clear_x = float(settings["crossing_clear_m"])
    step_k = float(settings["edge_step_min_k"])
    probe = float(settings["cut_probe_m"])
    cut = (False, False, False, False)
    s_lo = s_hi = w_lo = w_hi = 0.0
    comb_k = 0.0
    for _ in range(int(settings["refine_passes"])):
        across = np.array([-axis[1], axis[0]])
        if across @ face < 0:
            across = -across
        s = (x - centre[0]) * axis[0] + (y - centre[1]) * axis[1]
        w = (x - centre[0]) * across[0] + (y - centre[1]) * across[1]
        inner = valid & (np.abs(s) < 0.35 * length) & (np.abs(w) < 0.35 * depth)
        if inner.sum() > 16:
            level = _mode(t[inner], settings["level_bin_k"])
            band = glass_band(t[inner], level, settings["level_bin_k"], tol)
        glass = valid & (t >= band[0]) & (t <= band[1])
        comb = _comb(x, y, t, centre, axis, across, length, depth, module, layout, settings, gsd, cand.ground_c,
                     across_reach_m)
        if comb is not None:
            # the frame-line comb: the table's extent whatever the ground's temperature
            _, ds, dw, ext_s, ext_w, comb_k = comb
            s_lo, s_hi, w_lo, w_hi = ds - 0.5 * ext_s, ds + 0.5 * ext_s, dw - 0.5 * ext_w, dw + 0.5 * ext_w
            c0 = c1 = c2 = c3 = False
            band_s = (s > s_lo + clear) & (s < s_hi - clear)
        else:
            band_w = np.abs(w) < max(0.25 * depth, depth / 2 - clear)
            s_lo, s_hi, c0, c1 = _extent(s[band_w], glass[band_w], valid[band_w], bin_m, close_m,
                                         -half, half, probe)
            if not math.isfinite(s_lo):
                return None, (False, False)
            band_s = (s > s_lo + clear) & (s < s_hi - clear)
            w_lo, w_hi, c2, c3 = _extent(w[band_s], glass[band_s], valid[band_s], bin_m, close_m, -half, half,
                                         probe)
            if not math.isfinite(w_lo):
                return None, (False, False)
        cut = (c0, c1, c2, c3)
        tv = np.where(valid, t, np.nan)
        ok = valid & band_s
        if not c2:
            w_lo = _half_crossing(w[ok], tv[ok], w_lo, -1, gsd, step_k)
        if not c3:
            w_hi = _half_crossing(w[ok], tv[ok], w_hi, +1, gsd, step_k)
        ok = valid & (w > w_lo + clear_x) & (w < w_hi - clear_x)
        if not c0:
            s_lo = _half_crossing(s[ok], tv[ok], s_lo, -1, gsd, step_k)
        if not c1:
            s_hi = _half_crossing(s[ok], tv[ok], s_hi, +1, gsd, step_k)
        # angle: straight lines through the long edges, measured piecewise
        n_seg = int(settings["angle_segments"])
        slopes, weights = [], []
        seg_edges = np.linspace(s_lo + clear_x, s_hi - clear_x, n_seg + 1)
        for edge, outward, is_cut in ((w_lo, -1, c2), (w_hi, +1, c3)):
            if is_cut:
                continue
            pts = []
            # the samples near the edge (all that _half_crossing looks at), then piece by piece
            near = np.flatnonzero(valid & (np.abs(w - edge) < 6 * gsd))
            s_n, w_n, t_n = s[near], w[near], tv[near]
            for a, b in zip(seg_edges[:-1], seg_edges[1:]):
                sel = (s_n >= a) & (s_n < b)
                pts.append((0.5 * (a + b), _half_crossing(w_n[sel], t_n[sel], edge, outward, gsd, step_k)))
            p = np.array(pts)
            if len(p) >= 2 and np.ptp(p[:, 0]) > 0:
                dev = p[:, 1] - np.median(p[:, 1])
                keep = np.abs(dev) < float(settings["angle_outlier_px"]) * gsd
                if keep.sum() >= 2:
                    slopes.append(np.polyfit(p[keep, 0], p[keep, 1], 1)[0])
                    weights.append(keep.sum())
        sm, wm = 0.5 * (s_lo + s_hi), 0.5 * (w_lo + w_hi)
        centre = centre + sm * axis + wm * across
        length, depth = s_hi - s_lo, w_hi - w_lo
        if slopes and not fixed_axis:
            dth = math.atan(float(np.average(slopes, weights=weights)))
            sgn = 1.0 if (axis[0] * across[1] - axis[1] * across[0]) > 0 else -1.0
            ang = math.atan2(axis[1], axis[0]) + sgn * dth
            axis = np.array([math.cos(ang), math.sin(ang)])
    across = np.array([-axis[1], axis[0]])
    if across @ face < 0:
        across = -across
    orientations: tuple[str, ...] = ("portrait", "landscape")
    if not any(cut):
        comb = _comb(x, y, t, centre, axis, across, length, depth, module, layout, settings, gsd, cand.ground_c,
                     across_reach_m)
        if comb is not None:
            orient, ds, dw, length, depth, comb_k = comb
            centre = centre + ds * axis + dw * across
            orientations = (orient,)
    fit = _build_fit(x, y, t, valid, centre, axis, across, length, depth, level, band, cand, cut, module,
                     layout, settings, gsd, orientations, comb_k)
    if fit is None:
        return None, (False, False)
    if not (cut[2] or cut[3]) and (fit.confidence < float(settings["min_confidence"])
                                   or fit.misfit > float(settings["max_misfit"])):
        fit = _snap_rows(x, y, t, valid, centre, axis, across, length, depth, level, band, cand, cut, module,
                         layout, settings, gsd, comb_k, fit)
    # the ends: the table goes on when the ground band beyond an end (up to most of a pitch:
    # the next table of a row stands about a pitch away) is at the glass level
    pitch = fit.module_s_m + fit.gap_s_m
    end_lo, end_hi = float(settings["end_band_m"]), float(settings["end_band_pitch"]) * pitch
    s_f = (x - fit.origin[0]) * fit.axis[0] + (y - fit.origin[1]) * fit.axis[1]
    w_f = (x - fit.origin[0]) * fit.across[0] + (y - fit.origin[1]) * fit.across[1]
    rows_in = valid & (w_f > 0.2 * fit.depth_m) & (w_f < 0.8 * fit.depth_m)
    ends = []
    for beyond in (-s_f, s_f - fit.length_m):
        sel = rows_in & (beyond > end_lo) & (beyond < end_hi)
        if sel.sum() < 16:
            ends.append(False)
            continue
        mid = float(np.median(t[sel]))
        ends.append(abs(mid - level) <= tol and abs(mid - level) < abs(mid - cand.ground_c))
    return fit, (ends[0], ends[1])


def _comb(x, y, t, centre, axis, across, length, depth, module, layout, settings, gsd, ground_c=math.nan,
          across_reach_m=None):
    """Orientation, centre offset (along, across) [m] and extents [m] from the frame-line comb.

    Each orientation's comb is measured with each line looked for within ``line_shift_m``
    (seams); an orientation whose line or row contrast is under half the other's is a comb of
    twice the module pitch over a table of the shorter module and is not taken; of the rest,
    the longer extent wins (then the larger line contrast, then the manifest's orientation).
    ``ground_c`` [degC], the ground around the table, tells the ground between two tables of a
    row from an end module (``level_tol_k``).
    """
    from pvscan.measure.layout_image.periodic import comb_extent

    cos_t = math.cos(math.radians(layout.tilt_deg))
    gap = float(layout.gap_m)
    s = (x - centre[0]) * axis[0] + (y - centre[1]) * axis[1]
    w = (x - centre[0]) * across[0] + (y - centre[1]) * across[1]
    reach = float(settings["comb_reach_m"])
    reach_w = reach if across_reach_m is None else float(across_reach_m)
    # the samples of the search window (a bin of slack: the comb's grid drops the rest)
    slack = gsd
    near = (np.abs(s) <= 0.5 * length + reach + slack) & (np.abs(w) <= 0.5 * depth + reach_w + slack)
    s, w, t = s[near], w[near], t[near]

    def run(orient: str, shift_m: float) -> Any:
        mod_s = module.width_m if orient == "portrait" else module.length_m
        mod_w = (module.length_m if orient == "portrait" else module.width_m) * cos_t
        lattice = (mod_w + gap * cos_t, gap * cos_t)
        return comb_extent(s, w, t, (-0.5 * length - reach, 0.5 * length + reach),
                           (-0.5 * depth - reach_w, 0.5 * depth + reach_w), (-0.15 * depth, 0.15 * depth),
                           mod_s + gap, gsd, float(settings["dip_fraction"]), float(settings["close_m"]),
                           shift_m, lattice, float(settings["level_tol_k"]), ground_c)

    found = {}
    for orient in ("portrait", "landscape"):
        r = run(orient, float(settings["line_shift_m"]))
        if r is not None:
            found[orient] = r
    if not found:
        return None
    # a comb of twice the module pitch runs over every other line of the shorter module, but
    # the glass between its lines is a line too (its row contrast is low) and its lines are
    # found one by one near the glass (their median contrast is low)
    # (the line contrast is the median over the window's lines of the comb's phase; the row
    # contrast is measured over the run's modules, and a run of one module has a single
    # middle, which beyond a table's end may be ground or shadow at any temperature: its row
    # contrast sets no bar for the other orientation)
    def modules(orient: str, r: Any) -> int:
        return int(round((r[1] - r[0]) / ((module.width_m if orient == "portrait" else module.length_m) + gap)))

    top_line = max(r[4] for r in found.values())
    top_row = max(r[5] for r in ({o: r for o, r in found.items() if modules(o, r) >= 2} or found).values())
    best = None
    for orient, r in found.items():
        if len(found) > 1 and (r[5] < 0.5 * top_row or r[4] < 0.5 * top_line):
            continue
        mod_s = module.width_m if orient == "portrait" else module.length_m
        key = (modules(orient, r) * (mod_s + gap), r[4], orient == layout.orientation)
        if best is None or key > best[0]:
            best = (key, orient, r)
    if best is None:  # each wins on one contrast: the larger product
        orient, r = max(found.items(), key=lambda kv: kv[1][4] * kv[1][5])
    else:
        orient, r = best[1], best[2]
    s_lo, s_hi, w_lo, w_hi, contrast, _ = r
    mod_s = module.width_m if orient == "portrait" else module.length_m
    n = int(round((s_hi - s_lo) / (mod_s + gap)))
    ext_s = n * mod_s + (n - 1) * gap
    return orient, 0.5 * (s_lo + s_hi), 0.5 * (w_lo + w_hi), ext_s, w_hi - w_lo, float(contrast)


def _snap_rows(x, y, t, valid, centre, axis, across, length, depth, level, band, cand, cut, module, layout,
               settings, gsd, comb_k, fit: TableFit) -> TableFit:
    """A lattice of whole module rows laid from either long edge, for a fit refused for its
    extent across (misfit or row-line test).

    The comb of a fixed table's frame lines can run on into its shadow (light through the
    module gaps), and a cloud shadow or a seam can stop it a row short: the extent across is
    then not a whole number of rows and the lattice laid over it misses the lines between the
    rows. Each of the two extents across (the comb's and the mosaic candidate's) is cut or
    grown to the whole numbers of rows either side of it, laid from its one long edge and from
    the other (to one row only from a lattice of one row). A lattice counts when every line
    between its rows shows and every row shows the frame lines between its modules
    (:func:`_build_fit` with ``every_row``), which a lattice a
    part of a row off, or a row laid on a shadow (light through the module gaps: warm lines)
    does not; of those the one of most rows, then the one whose row lines lie nearest their
    places (:func:`.rows._row_line_offset`, in whole pixels: the strongest weakest row does not
    see a lattice a few pixels off, whose lines are still found within ``line_shift_m``), then
    of the strongest weakest row (``rows_comb_k``), is kept when its confidence beats ``fit``'s.
    Nothing is laid where the comb itself (``comb_k``) is weaker than ``contrast_full_k``, or over a single column.
    Its ``misfit`` is its own (along the axis; across it lies on whole rows by construction).
    """
    cos_t = math.cos(math.radians(layout.tilt_deg))
    gap_w = float(layout.gap_m) * cos_t
    mod_w = (module.length_m if fit.orientation == "portrait" else module.width_m) * cos_t
    pitch_w = mod_w + gap_w
    w_cand = float((cand.centre - centre) @ across)
    best, best_key = fit, None
    if comb_k < float(settings["contrast_full_k"]):
        return fit  # no comb of frame lines to lay rows on (ground, a strip of shadow)
    for lo, hi in ((-0.5 * depth, 0.5 * depth), (w_cand - 0.5 * cand.depth_m, w_cand + 0.5 * cand.depth_m)):
        n_w = (hi - lo + gap_w) / pitch_w
        for m in sorted({math.floor(n_w), math.ceil(n_w)}):
            if m < 1 or (m == 1 and fit.rows > 1):
                continue  # a lattice of rows is not cut to one row (no line between rows to test)
            d_new = m * pitch_w - gap_w
            for mid in (lo + 0.5 * d_new, hi - 0.5 * d_new):
                f = _build_fit(x, y, t, valid, centre + mid * across, axis, across, length, d_new, level, band,
                               cand, cut, module, layout, settings, gsd, (fit.orientation,), comb_k, True)
                if f is None:
                    continue
                if f.confidence <= 0:
                    continue
                # where its row lines lie, in whole pixels (the resolution of the image)
                sf = (x - f.origin[0]) * axis[0] + (y - f.origin[1]) * axis[1]
                wf = (x - f.origin[0]) * across[0] + (y - f.origin[1]) * across[1]
                off = _row_line_offset(sf, wf, t, f.cols, f.rows, f.module_s_m, f.module_w_m, f.gap_s_m, f.gap_w_m,
                                       gsd, float(settings["line_shift_m"]))
                key = (f.rows, -round(off / gsd) if math.isfinite(off) else 0, f.rows_comb_k)
                if best_key is None or key > best_key:
                    best, best_key = f, key
    return best if best.confidence > fit.confidence else fit


def _build_fit(x, y, t, valid, centre, axis, across, length, depth, level, band, cand, cut, module, layout,
               settings, gsd, orientations=("portrait", "landscape"), comb_k=0.0,
               every_row: bool = False, split: bool = True) -> TableFit | None:
    cos_t = math.cos(math.radians(layout.tilt_deg))
    gap_s, gap_w = float(layout.gap_m), float(layout.gap_m) * cos_t
    tie = float(settings["orientation_tie_misfit"])
    part = float(settings["cut_module_share"])
    best = None
    for orient in orientations:
        mod_s = module.width_m if orient == "portrait" else module.length_m
        mod_w = (module.length_m if orient == "portrait" else module.width_m) * cos_t
        n, rs = _lattice(length, mod_s, gap_s)
        m, rw = _lattice(depth, mod_w, gap_w)
        # a cut edge: only whole modules of the visible part count; misfit from the other axis
        misfit = max(rs if not (cut[0] or cut[1]) else 0.0, rw if not (cut[2] or cut[3]) else 0.0)
        key = (round(misfit, 2) if misfit > tie else 0.0, orient != layout.orientation)
        if best is None or key < best[0]:
            best = (key, orient, mod_s, mod_w, n, m, misfit)
    assert best is not None
    _, orient, mod_s, mod_w, n, m, misfit = best
    s0, w0 = -0.5 * length, -0.5 * depth
    # even share of the measured extent, unless an edge is cut (then the datasheet pitch from the other edge)
    if cut[0] or cut[1]:
        n = max(1, int(math.ceil((length + gap_s) / (mod_s + gap_s) - part)))
        size_s = mod_s
        if cut[0] and not cut[1]:
            s0 = 0.5 * length - n * mod_s - (n - 1) * gap_s
    else:
        size_s = _size(length, n, mod_s, gap_s, settings)
        s0 = -0.5 * (n * size_s + (n - 1) * gap_s)
    if cut[2] or cut[3]:
        m = max(1, int(math.ceil((depth + gap_w) / (mod_w + gap_w) - part)))
        size_w = mod_w
        if cut[2] and not cut[3]:
            w0 = 0.5 * depth - m * mod_w - (m - 1) * gap_w
    else:
        size_w = _size(depth, m, mod_w, gap_w, settings)
        w0 = -0.5 * (m * size_w + (m - 1) * gap_w)
    if n * m > int(settings["max_table_modules"]):
        return None
    origin = centre + s0 * axis + w0 * across
    # per-module share of valid and glass pixels
    s = (x - origin[0]) * axis[0] + (y - origin[1]) * axis[1]
    w = (x - origin[0]) * across[0] + (y - origin[1]) * across[1]
    ci = np.floor(s / (size_s + gap_s)).astype(int)
    ri = np.floor(w / (size_w + gap_w)).astype(int)
    inside = (ci >= 0) & (ci < n) & (ri >= 0) & (ri < m)
    inside &= (s - ci * (size_s + gap_s) < size_s) & (w - ri * (size_w + gap_w) < size_w)
    lab = np.where(inside, ri * n + ci, n * m)
    tot = np.bincount(lab, minlength=n * m + 1)[:-1].astype(float)
    val = np.bincount(lab, weights=valid, minlength=n * m + 1)[:-1]
    gl = np.bincount(lab, weights=valid & (t >= band[0]) & (t <= band[1]), minlength=n * m + 1)[:-1]
    expected = size_s * size_w / gsd ** 2
    valid_frac = (val / np.maximum(expected, 1)).reshape(m, n)
    glass = (gl / np.maximum(val, 1)).reshape(m, n)
    status = np.full((m, n), "ok", dtype=object)
    status[valid_frac < float(settings["min_valid_fraction"])] = "cut"
    status[(val / np.maximum(tot, 1)).reshape(m, n) < float(settings["nodata_share"])] = "nodata"
    status[(tot.reshape(m, n) == 0)] = "nodata"
    # the evidence of a table: its glass against the ground, or (ground at the glass
    # temperature) the comb of frame lines between its modules [K]
    # (the ground off the glass level too: a shadow at the glass level beside the table can
    # take the ring's median to it)
    contrast = max(abs(level - cand.ground_c) if math.isfinite(cand.ground_c) else 0.0,
                   abs(level - cand.ground_off_c) if math.isfinite(cand.ground_off_c) else 0.0, comb_k)
    conf = (max(0.0, 1.0 - 2.0 * misfit) * float(np.median(glass))
            * min(1.0, contrast / float(settings["contrast_full_k"])))
    # rows of modules show the lines between them as the modules of a row do (a lattice laid
    # over a shadow or ground beside the table does not)
    # (``every_row``: every line, not the median, for a lattice whose rows were not measured)
    row_lines = _row_lines(s, w, t, n, m, size_s, size_w, gap_s, gap_w, gsd, float(settings["line_shift_m"]),
                           every_row)
    if math.isfinite(row_lines) and (row_lines < float(settings["dip_fraction"]) * comb_k
                                     or row_lines < float(settings["contrast_full_k"])):
        conf = 0.0
    if split and conf > 0 and m >= 2 and n >= 3 and not (cut[0] or cut[1]):
        run = _columns_run(s, w, t, n, m, size_s, size_w, gap_s, gap_w, gsd, settings,
                           float((cand.centre - origin) @ axis) / (size_s + gap_s))
        if run is not None:
            # the lattice over the run of columns that are modules (:func:`.rows._columns_run`)
            c0, c1 = run
            k = c1 - c0 + 1
            mid = s0 + (c0 + 0.5 * k) * (size_s + gap_s) - 0.5 * gap_s
            return _build_fit(x, y, t, valid, centre + mid * axis, axis, across, k * size_s + (k - 1) * gap_s,
                              depth, level, band, cand, cut, module, layout, settings, gsd, (orient,), comb_k,
                              every_row, split=False)
    rows_comb = math.nan
    if every_row and n < 2:
        conf = 0.0  # one module has no frame lines of its own to test
    if every_row and conf > 0 and n >= 2:
        # and each row shows the frame lines between its modules (a shadow beside a fixed
        # table shows light through the module gaps instead, warmer lines)
        shift = float(settings["line_shift_m"])
        col_lines = []
        for r in range(m):
            w_r = w - r * (size_w + gap_w)
            near = (w_r > -0.5 * size_w) & (w_r < 1.5 * size_w)
            col_lines.append(_row_lines(w_r[near], s[near], t[near], 1, n, size_w, size_s, gap_w, gap_s, gsd,
                                        shift))
        rows_comb = float(np.min(col_lines))
        if not (rows_comb >= float(settings["dip_fraction"]) * comb_k
                and rows_comb >= float(settings["contrast_full_k"])):
            conf = 0.0
    return TableFit(origin=origin, axis=axis, across=across, length_m=float(length), depth_m=float(depth),
                    rows=m, cols=n, orientation=orient, module_s_m=float(size_s), module_w_m=float(size_w),
                    gap_s_m=gap_s, gap_w_m=gap_w, confidence=float(np.clip(conf, 0, 1)), misfit=float(misfit),
                    level_c=float(level), contrast_k=float(contrast),
                    cut=(bool(cut[0]), bool(cut[1]), bool(cut[2]), bool(cut[3])),
                    status=status, glass=glass, rows_comb_k=rows_comb)
