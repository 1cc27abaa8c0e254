"""Substrings whose bypass diode conducts: ``bypassed_substring`` and ``several_bypassed_substrings``.

A conducting bypass diode leaves its substring's cells producing nothing, so the whole
strip (substring ``k = floor(v * bypass_diodes)``, running the module's full length) runs
the open-module rise ``eta * G / U(v)`` warmer than the producing substrings, as a flat
plateau on whole cell columns. Mosaic seams and reflections make raised strips too; the
tests here tell them apart by geometry: a seam is straight, crosses modules and rows, and
leaves cell columns part raised where it crosses a module at an angle.

References
----------
.. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
"""
from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from scipy.special import ndtr

from pvscan.diagnose.features import Features, Hits, confidence, fit_score, quality
from pvscan.robust import iqr, nanmax, nanmean, nanmedian, nanmin

__all__ = ["pattern_bypassed_substring"]


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
    lo = nanmin(F.Rsub, axis=1)
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
    Xlo = F.R - nanmin(F.base_sub, axis=1)[:, None, None]
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
    flat = iqr(Xin, axis=1) <= np.maximum(float(cfg["open_uniform_iqr"]) * r, float(cfg["open_uniform_floor_k"]))
    hit = F.ok & clean & fit_ok & cover_ok & flat & (mean_raise >= floor)
    # columns part raised: expected share from cell noise alone, plus a margin
    with np.errstate(invalid="ignore", divide="ignore"):
        p_noise = 2.0 * ndtr(-0.25 * mean_raise / max(F.sig_cell, 1e-3))  # normal upper tail
    # the columns on either side of the plateau's edges, where a slanted step shows (the
    # module's outer columns see the ground and the frame and are left alone)
    cr = col_raised.astype(np.int8)
    edge_col = np.zeros_like(col_raised)
    edge_col[:, 1:] |= cr[:, 1:] != cr[:, :-1]
    edge_col[:, :-1] |= cr[:, :-1] != cr[:, 1:]
    partial = _intermediate_columns(F, np.where(edge_col[:, None, :], Xlo, np.nan), mean_raise,
                                    float(cfg["substring_edge_bleed"]))
    hit &= ~(partial > p_noise + float(cfg["substring_partial_max"]))
    # and those columns on the plateau (raised or not) within the cell noise: the worst
    # one's mean squared deviation from the plateau model, in cell-noise units (clipped at 5)
    model = np.where(col_raised[:, None, :], mean_raise[:, None, None], 0.0)
    # the yardstick of an edge column: cell noise, and the share of the plateau's raise that
    # spreads into the column beside it (heat conducted across the cell gap, footprints a
    # few centimetres off the cell grid): a large raise lends its neighbour a fraction of it
    bleed = float(cfg["substring_edge_bleed"]) * np.nan_to_num(mean_raise, nan=0.0)
    scale = np.sqrt(max(F.sig_cell, 1e-3) ** 2 + bleed * bleed)[:, None, None]
    zc = np.clip((Xlo - model) / scale, -5.0, 5.0)
    col_chi2 = nanmax(np.where(edge_col, nanmean(zc * zc, axis=1), np.nan), axis=1)
    col_chi2 = np.nan_to_num(col_chi2, nan=0.0)
    hit &= ~(col_chi2 > float(cfg["substring_column_chi2_max"]))
    hit &= ~_carried_across_edge(F, raised, hit)
    hit &= ~_steps_on_one_line(F, raised, hit, float(cfg["substring_line_tol_m"]))
    conf = confidence(fit_score(ratio), quality(mean_raise, floor), np.clip((cover_in - cover_out), 0, 1))
    # region temperature: median of the raised substrings' measured medians
    temp = nanmedian(np.where(raised, F.extra["sub_median"], np.nan), axis=1)
    single = Hits("bypassed_substring", hit & (nr == 1), conf, temp)
    multi = Hits("several_bypassed_substrings", hit & (nr >= 2), conf, temp)
    for i in np.flatnonzero(hit).tolist():
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
    for i in cand.tolist():
        steps = np.flatnonzero(raised[i, 1:] != raised[i, :-1])
        d = fu[i] / max(float(np.hypot(*fu[i])), 1e-9)
        for s in steps:
            lines.append((int(i), p0[i] + 0.5 * fu[i] + (s + 1) / B * fv[i], d))
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
        t_cool = float(nanmedian(np.where(raised[i], np.nan, sm[i])))
        t_warm = float(nanmedian(np.where(raised[i], sm[i], np.nan)))
        step = t_warm - t_cool
        for j in (int(j) for j in adj[i, :2] if j >= 0):
            d = float(nanmedian(np.where(raised[i], sm[j], np.nan)) -
                      nanmedian(np.where(raised[i], np.nan, sm[j])))
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


def _intermediate_columns(F: Features, Xlo: np.ndarray, raise_k: np.ndarray, bleed: float = 0.0) -> np.ndarray:
    """Largest share, over the module's cell columns, of cells that break the column's pattern.

    A conducting bypass diode raises whole cell columns (its substring's) to the plateau;
    a step of the image crossing the module at an angle leaves columns part raised: cells
    half-way up, or some cells of the column up and others down. Half-way is between
    ``0.25 + bleed`` and ``0.75 - bleed`` of the raise: the column beside the plateau
    borrows up to ``bleed`` of it (heat across the cell gap, a footprint a few centimetres
    off the cell grid) and the plateau's edge column lends as much, so the band keeps the
    quarter-raise margin from either level (and the noise share expected, computed with
    that margin, stays the same).
    """
    lo, hi = 0.25 + bleed, 0.75 - bleed
    with np.errstate(invalid="ignore", divide="ignore"):
        x = Xlo / raise_k[:, None, None]
        valid = np.isfinite(x)
        nv = np.maximum(valid.sum(axis=1), 1)
        mid = ((x > lo) & (x < hi)).sum(axis=1) / nv
        up = (x >= 0.5).sum(axis=1) / nv
        mixed = np.minimum(up, 1.0 - up)
        return np.maximum(mid, mixed).max(axis=1)
