"""Potential-induced degradation along a string: ``pid``.

PID shunts cells of the modules nearest the string's negative end (``string_index`` 1)
most, fading along the string, in a patchy pattern strongest at the cells next to the
grounded frame. The telling sign is a module's edge ring of cells running warmer than its
interior (:func:`pid_ring_contrast`), which the module-to-module spread does not blur.

References
----------
.. [1] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from pvscan.diagnose.features import Features
from pvscan.robust import nanmedian, scaled_mad, sorted_quantile

__all__ = ["pid_ring_contrast", "pattern_pid", "unexplained_string_pattern", "unexplained_tail_evidence",
           "extension_evidence", "excess_z"]


def _trimmed_mean(x: np.ndarray, cut: float = 0.1) -> np.ndarray:
    """Mean along the last axis without the lowest and highest ``cut`` share, ignoring NaN.

    Both bounds come from one sort of the rows (:func:`pvscan.robust.sorted_quantile`)."""
    srt = np.sort(np.asarray(x, dtype=np.float64), axis=-1)
    cnt = np.isfinite(srt).sum(axis=-1)
    lo = sorted_quantile(srt, cnt, cut)[..., None]
    hi = sorted_quantile(srt, cnt, 1.0 - cut)[..., None]
    keep = (x >= lo) & (x <= hi)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(keep, x, 0.0).sum(axis=-1) / np.maximum(keep.sum(axis=-1), 1) + \
            np.where(keep.sum(axis=-1) > 0, 0.0, np.nan)


def pid_ring_contrast(F: Features, residual: np.ndarray | None = None) -> np.ndarray:
    """How much warmer a module's edge cells run than its interior cells [K].

    The median over the four edges (lines of cells along ``u = 0``, ``u = 1``, ``v = 0``,
    ``v = 1``) of the edge's trimmed mean residual minus the interior's.

    The 10 % trimming keeps a single hot cell from posing as an edge-weighted pattern. The
    residual is taken against modules outside the string (``F.extra["R_other"]``) when
    available: PID modules sit side by side, and their neighbours' shared shape would
    carry part of their own pattern. ``residual`` (modules x cells along x cells across
    [K]) replaces it, e.g. ``F.R``, the residual against the module's own table row.
    """
    n, A, C = F.n, F.n_along, F.n_across
    ii, jj = np.indices((A, C))
    ring = ((ii == 0) | (ii == A - 1) | (jj == 0) | (jj == C - 1)).ravel()
    if residual is None:
        residual = F.extra.get("R_other", F.R)
    flat = np.asarray(residual).reshape(n, -1)
    core = _trimmed_mean(flat[:, ~ring])
    # each of the four edges on its own, then the median of the four: PID warms all edges,
    # a seam or warm ground along a row one of them
    sides = [(ii == 0), (ii == A - 1), (jj == 0), (jj == C - 1)]
    per_side = np.stack([_trimmed_mean(flat[:, m.ravel()]) - core for m in sides], axis=1)
    return nanmedian(per_side, axis=1)


def pattern_pid(F: Features, cfg: Mapping, groups: np.ndarray, pos: np.ndarray,
                is_string: bool, exclude: np.ndarray) -> list[list[int]]:
    """Potential-induced degradation along a string.

    PID shunts cells of the modules nearest the string's negative end (``string_index``
    1) most, fading along the string, in a patchy pattern strongest at the cells next to
    the grounded frame. The telling sign is the contrast of a module's edge ring of cells
    over its interior (:func:`pid_ring_contrast`), insensitive to the module-to-module
    spread, in robust standard deviations of healthy modules' contrast. A string
    qualifies when its module at the negative end reaches ``pid_seed_z`` (or reaches
    ``pid_faint_seed_z`` with the second module reaching ``pid_seed_z``) and is warmer than its
    surroundings; the affected run extends from the negative end while the
    contrast keeps above ``pid_extend_z`` on balance (the end maximises ``sum(z -
    pid_extend_z)``, so a single weaker module between stronger ones does not end it),
    over at least ``pid_min_modules`` and at most the first ``pid_max_position`` of the
    string, the modules after the first reaching ``pid_rest_z`` by themselves (the best
    prefix of them, ``sum(z) / sqrt(m)``), the best run from the negative end having combined evidence
    ``sum(z) / sqrt(n)`` of at least ``pid_run_z``, and the run's median excess over
    modules outside its string, in robust spreads of healthy modules, at least
    ``pid_warm_min_z``, and so the excess of its module at the negative end, the most
    affected one (PID takes power away, so the modules run warmer, not clearly cooler).
    With strings known, the run must show the edge-ring pattern against its own table row
    too (the contrast of :func:`pid_ring_contrast` on the residual against the row, ``F.R``,
    in robust spreads of healthy modules, combined evidence ``sum(z) / sqrt(m)`` over the
    run's first ``m`` modules within the first ``pid_max_position`` of the string, the best
    ``m`` of at least two, at least ``pid_own_row_min_z``; the row's shared shape is taken from
    the module's neighbours, which along a PID string are PID modules themselves, so the
    pattern holds against them mainly at the negative end, where it fades from): an image
    artefact shared by a stretch of a row (a mosaic seam shifting its pixels, a reflection
    band) shows against modules of other rows, not against the row's own modules beside the
    string.

    Without strings (``is_string`` false, ``groups`` the table rows of a layout of table
    polygons), a string's negative end may be at any module of a row, facing either way:
    every module is tried as the first, both ways along the row, when it reaches
    ``pid_row_seed_z`` by itself and the module before it shows at most half its contrast
    (PID is strongest at the negative end); the run's evidence must reach ``pid_row_run_z``,
    and the runs of one row may not overlap (the strongest kept). At a row's end (a string's
    end wherever strings run along the rows) a run is also tried as in a string, when its
    edge-ring contrast over the run within the first ``pid_max_position`` of the row, less the
    median contrast of the row's modules past it, has combined evidence ``sum / sqrt(n)`` of
    at least ``pid_row_end_far_z`` (the row's far part standing in for its other strings).

    Returns
    -------
    list of list of int
        The affected modules of each PID string (or table-row run), from the negative end.
    """
    contrast = pid_ring_contrast(F)
    healthy = F.ok & ~exclude & np.isfinite(contrast)
    if healthy.sum() < 5:
        return []
    c0 = float(np.median(contrast[healthy]))
    sig = max(scaled_mad(contrast[healthy]), 0.02)
    z = (contrast - c0) / sig
    F.extra["pid_z"] = z
    z_o = excess_z(F, cfg)
    z_ext = extension_evidence(z, z_o, cfg)
    out: list[list[int]] = []
    usable = F.ok & ~exclude
    z_row = None
    if is_string:
        # the same contrast against the module's own table row (strings known: the row holds
        # modules of other strings beside the string)
        c_row = pid_ring_contrast(F, F.R)
        ok_row = F.ok & ~exclude & np.isfinite(c_row)
        if ok_row.sum() >= 5:
            z_row = (c_row - float(np.median(c_row[ok_row]))) / max(scaled_mad(c_row[ok_row]), 0.02)
        F.extra["pid_z_row"] = z_row
    for g in np.unique(groups[groups >= 0]):
        idx = np.flatnonzero(groups == g)
        idx = idx[np.argsort(pos[idx], kind="stable")]
        if len(idx) < 3:
            continue
        if is_string:
            max_len = max(int(np.floor(float(cfg["pid_max_position"]) * len(idx))), 1)
            run = _run_from(idx, z, z_ext, z_o, usable, cfg, max_len, float(cfg["pid_run_z"]))
            # (over the run within the first pid_max_position of the string: modules past it
            # join by a stricter test of their own)
            core = run[:max_len] if run else run
            if core and z_row is not None and not (
                    _best_prefix(z_row[core], 2) >= float(cfg["pid_own_row_min_z"])):
                run = None
            if run:
                out.append(run)
            continue
        # a table row standing in for unknown strings: a string's negative end may be at any
        # module of the row, facing either way; the run must start where the pattern starts
        # (its first module reaching pid_row_seed_z, the module before it, if any, showing at
        # most half its contrast: PID is strongest at the negative end), its evidence reach
        # pid_row_run_z (many more starts are tried than in a string), and runs found in one
        # row may not overlap (the strongest first)
        max_len = max(int(np.floor(float(cfg["pid_max_position"]) * len(idx))), 2)
        found = []
        for step in (1, -1):
            seq_all = idx if step == 1 else idx[::-1]
            for s0 in range(len(seq_all) - 1):
                if s0 > 0:
                    prev = seq_all[s0 - 1]
                    if usable[prev] and z[prev] >= 0.5 * z[seq_all[s0]]:
                        continue
                run = _run_from(seq_all[s0:], z, z_ext, z_o, usable, cfg, max_len, float(cfg["pid_row_run_z"]),
                                float(cfg["pid_row_seed_z"]))
                if run:
                    zc = float(np.nansum(z[run]) / np.sqrt(len(run)))
                    found.append((zc, run))
        taken: set[int] = set()
        for _zc, run in sorted(found, key=lambda t: -t[0]):
            if taken.isdisjoint(run):
                taken.update(run)
                out.append(run)
        # a row's end is a string's end wherever strings run along the rows (common practice):
        # there the run is tried as in a string (the string's seed and run bars), and its
        # evidence must hold against the far part of its own row too (the modules past the
        # first pid_max_position from that end, their median contrast subtracted), the row's
        # own modules standing in for the other strings of the row: an artefact along the
        # whole row (a seam, warm ground beside it) shows there as well
        far_z = float(cfg["pid_row_end_far_z"])
        for seq_all in (idx, idx[::-1]):
            far = seq_all[max_len:]
            far = far[usable[far]]
            if len(far) < 2:
                continue
            run = _run_from(seq_all, z, z_ext, z_o, usable, cfg, max_len, float(cfg["pid_run_z"]))
            if not run or not taken.isdisjoint(run):
                continue
            core = run[:max_len]
            if float(np.sum(z[core] - np.median(z[far]))) / np.sqrt(len(core)) >= far_z:
                taken.update(run)
                out.append(run)
    return out


def _best_prefix(z: np.ndarray, m_min: int) -> float:
    """The highest ``sum(z[:m]) / sqrt(m)`` over ``m >= m_min`` (NaN counted as 0; over all of
    ``z`` when it is shorter) [robust SD]."""
    zz = np.nan_to_num(np.asarray(z, dtype=float), nan=0.0)
    ev = np.cumsum(zz) / np.sqrt(np.arange(1, len(zz) + 1))
    return float(np.max(ev[min(m_min, len(ev)) - 1:]))


def _run_from(idx: np.ndarray, z: np.ndarray, z_ext: np.ndarray, z_o: np.ndarray, usable: np.ndarray,
              cfg: Mapping, max_len: int, run_z: float, seed_z: float | None = None) -> list[int] | None:
    """The PID run starting at ``idx[0]`` (the negative end) along ``idx``, or None.

    ``z``: edge-ring contrast [robust SD]; ``z_ext``: contrast and excess combined; ``z_o``:
    excess over modules outside the string [robust SD]; ``usable``: classified modules
    without a pattern of more weight; ``max_len``: longest run; ``run_z``: least combined
    evidence of the best run; ``seed_z``: when given, the first module must reach it by
    itself (no faint seed). See :func:`pattern_pid` for the tests.
    """
    if len(idx) < 2:
        return None
    first, second = idx[0], idx[1]
    if not usable[first]:
        return None
    # the seed: the module at the negative end shows the pattern, or shows some of it
    # (the extension bar) with the next module showing it fully; a PID pattern is
    # patchy, and the most affected module need not be the most edge-weighted one
    z_seed = float(cfg["pid_seed_z"])
    if seed_z is not None:
        seeded = bool(z[first] >= seed_z)
    else:
        seeded = z[first] >= z_seed or (
            z[first] >= float(cfg["pid_faint_seed_z"]) and bool(usable[second]) and z[second] >= z_seed)
    if not seeded:
        return None
    # no single module after the first carries the string's evidence by itself: its
    # contrast counts for at most pid_z_cap there (a bypassed strip or a seam edge along
    # one module's frame can give it a huge edge contrast)
    cap = float(cfg["pid_z_cap"])
    sub = idx[:max_len]
    zz = np.where(usable[sub], z_ext[sub], np.nan)
    zr = np.where(usable[sub], np.minimum(z[sub], cap), np.nan)
    if np.isnan(zz).any():
        cut = int(np.argmax(np.isnan(zz)))
        zr, zz = zr[:cut], zz[:cut]
    m_min = int(cfg["pid_min_modules"])
    if len(zz) < max(m_min, 2):
        return None
    # the modules after the first carry the cell pattern on by themselves (best prefix
    # of their edge-ring contrast, sum(z) / sqrt(m)): one warm-edged module at a
    # string's end is not PID, nor a string that a reflection or a seam warms as a
    # whole; but one weaker module right after the first does not undo a string that
    # shows the pattern further on
    rest = np.cumsum(zr[1:]) / np.sqrt(np.arange(1, len(zr)))
    # over two or more modules after the first, the evidence holds without the strongest
    # of them (leave-max-out): one strongly edged module and a little noise around it do
    # not make a string PID, while every module of a PID string shows the pattern
    m_rest = np.arange(1, len(zr))
    loo = (np.cumsum(zr[1:]) - np.maximum.accumulate(zr[1:])) / np.sqrt(np.maximum(m_rest - 1, 1))
    rest = np.where(m_rest >= 2, loo, rest)
    if np.max(rest[max(m_min - 2, 0):]) < float(cfg["pid_rest_z"]):
        return None
    score = np.cumsum(zz) / np.sqrt(np.arange(1, len(zz) + 1))
    if np.max(score[m_min - 1:]) < run_z:
        return None
    # where the pattern stops: the end that maximises sum(z - pid_extend_z) from the
    # negative end (a change point: modules above the bar add, below it take away, so a
    # single weak module between stronger ones does not end the run)
    gain = np.cumsum(zz - float(cfg["pid_extend_z"]))
    k = int(np.argmax(gain[m_min - 1:])) + m_min
    # ... and a last module showing less than pid_end_min_share of the evidence of the module
    # before it is past the run (PID fades along the string, neighbouring modules alike; a
    # healthy module after a strong run clears the extension bar by its noise alone)
    while k > m_min and zz[k - 1] < float(cfg["pid_end_min_share"]) * zz[k - 2]:
        k -= 1
    # PID takes power away, so the affected modules run warmer than modules outside
    # their string (a seam or a shadow edge crossing the string's end need not); the run as
    # a whole, and its module at the negative end, which loses the most, by itself (a seam
    # along a row warms the edge cells of modules that run no warmer)
    w_min = float(cfg["pid_warm_min_z"])
    if not float(np.nanmedian(z_o[idx[:k]])) >= w_min or not float(z_o[first]) >= w_min:
        return None
    # past the first pid_max_position of the string PID is less likely (the modules there sit
    # at a lesser negative potential), not ruled out (the split of the potential depends on the
    # inverter's grounding and the string's voltage): a run that reaches the limit goes on only
    # while each next module shows both signs by itself, the edge-ring pattern at the seed bar
    # and an excess of pid_past_min_excess_z robust spreads over modules outside the string
    if k == len(zz) == max_len and seed_z is None:
        z_bar, o_bar = float(cfg["pid_seed_z"]), float(cfg["pid_past_min_excess_z"])
        while (k < len(idx) and usable[idx[k]] and bool(z[idx[k]] >= z_bar)
               and bool(z_o[idx[k]] >= o_bar)):
            k += 1
    return [int(i) for i in idx[:k]]


def unexplained_string_pattern(z: np.ndarray, z_row: np.ndarray, groups: np.ndarray, pos: np.ndarray,
                               free: np.ndarray, max_position: float) -> tuple[float, int | None, int]:
    """The strongest PID pattern from a string's negative end that no finding takes in.

    For every string (``groups``, ordered by ``pos`` from the negative end) whose first module
    is ``free`` (classified, in no finding), the combined evidence ``sum(z) / sqrt(m)`` of the
    lesser of the edge-ring contrast against modules of other rows (``z``) and against the
    module's own table row (``z_row``) [robust SD], over the first ``m`` modules, ``m`` from 1
    up to the first ``max_position`` of the string and while the modules stay free (the best
    ``m``). PID fades along the string from its negative end (IEC TS 62446-3; common practice),
    so a faint pattern shows over several modules there before any one of them reaches a bar
    by itself; ``m = 1`` is the module at the negative end alone.

    Returns
    -------
    (value, module, m)
        The highest evidence (0 when no string qualifies, never below 0), the index of the
        first module of its string (None when none) and ``m``.
    """
    both = np.minimum(np.asarray(z, dtype=float), np.asarray(z_row, dtype=float))
    best: tuple[float, int | None, int] = (-np.inf, None, 0)
    for g in np.unique(groups[groups >= 0]):
        idx = np.flatnonzero(groups == g)
        idx = idx[np.argsort(pos[idx], kind="stable")]
        sub = idx[:max(int(np.floor(max_position * len(idx))), 1)]
        ok = free[sub] & np.isfinite(both[sub])
        if not ok[0]:
            continue
        sub = sub[:len(sub) if ok.all() else int(np.argmax(~ok))]
        ev = np.cumsum(both[sub]) / np.sqrt(np.arange(1, len(sub) + 1))
        j = int(np.argmax(ev))
        if float(ev[j]) > best[0]:
            best = (float(ev[j]), int(sub[0]), j + 1)
    return (max(best[0], 0.0), best[1], best[2])


def excess_z(F: Features, cfg: Mapping) -> np.ndarray:
    """Each module's excess over modules outside its string, in robust spreads of that excess [-].

    The spread is taken at least ``[classify] other_spread_floor_k`` [K] (``cfg``; a camera's
    noise-equivalent temperature difference)."""
    floor_k = float(cfg["other_spread_floor_k"])
    return np.asarray(F.extra["d_other"], dtype=float) / max(float(F.extra.get("sig_other", F.sig_mod)), floor_k)


def extension_evidence(z: np.ndarray, z_o: np.ndarray, cfg: Mapping) -> np.ndarray:
    """The evidence a PID run is extended by [robust SD]: the edge-ring contrast ``z`` and the
    module's excess over modules outside its string ``z_o`` together,
    ``(z + w * clip(z_o, -c, c)) / sqrt(1 + w^2)`` with ``w`` = ``[classify] pid_excess_weight`` and
    ``c`` = ``pid_excess_clip_z`` (one very warm or cool module, a hot spot or a shadow, does not
    carry a run by its excess alone)."""
    w = float(cfg["pid_excess_weight"])
    c = float(cfg["pid_excess_clip_z"])
    return (np.asarray(z, dtype=float) + w * np.clip(z_o, -c, c)) / np.sqrt(1.0 + w * w)


def unexplained_tail_evidence(z_ext: np.ndarray, groups: np.ndarray, pos: np.ndarray, is_string: bool,
                              free: np.ndarray, runs: list[list[int]]) -> tuple[float, int | None, int]:
    """The strongest combined PID evidence over modules in no finding past the end of a found PID run.

    ``z_ext``: each module's edge-ring contrast and its excess over modules outside its string
    combined (the evidence :func:`pattern_pid` extends a run by) [robust SD]. From the module
    after each found PID run (``runs``, each from its negative end) on along its string (``groups``
    ordered by ``pos``) to the string's end, over ``m`` consecutive modules that are ``free``
    (classified, in no finding), the combined evidence ``sum(z_ext) / sqrt(m)`` (the best ``m``,
    :func:`unexplained_string_pattern`). PID fades along the string (common practice), and where a
    run stops is uncertain: its last modules lose little enough to sit near the noise one by one.
    Without strings (``is_string`` false, ``groups`` the table rows) along the row from both ends
    of the run (a run found along a row may face the wrong way).

    Returns
    -------
    (value, module, m)
        The highest evidence (0 when nothing qualifies, never below 0), the first module of its
        modules (None when none) and ``m``.
    """
    zx = np.asarray(z_ext, dtype=float)
    best: tuple[float, int | None, int] = (0.0, None, 0)
    for run in runs:
        if not run:
            continue
        idx = np.flatnonzero(groups == groups[run[0]])
        order = idx[np.argsort(pos[idx], kind="stable")]
        if len(run) >= 2 and pos[run[1]] < pos[run[0]]:
            order = order[::-1]
        at = np.flatnonzero(np.isin(order, run))
        if not len(at):
            continue
        tails = [order[int(at.max()) + 1:]] + ([] if is_string else [order[:int(at.min())][::-1]])
        for tail in tails:
            tg = np.full(len(zx), -1)
            tg[tail] = 0
            tpos = np.zeros(len(zx))
            tpos[tail] = np.arange(len(tail))
            v, i, m = unexplained_string_pattern(zx, zx, tg, tpos, free, 1.0)
            if i is not None and v > best[0]:
                best = (v, i, m)
    return best
