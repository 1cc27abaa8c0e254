"""Modules and strings that deliver no power: ``open_module`` and ``open_string``.

A module that is open (broken connector, cable, junction box) or a string that is open
(blown fuse, open connector, tripped input) turns the power it no longer delivers into
heat, so each of its modules runs the open-module rise ``eta * G / U(v)`` warmer than
producing modules (Faiman heat balance), uniformly over the module. An open module must
clear a likelihood-ratio floor over the module-to-module spread; an open string is a run of
consecutive raised modules of one string (or table row), judged against a reference that
excludes the string itself, that opens as a whole and stops where the string stops.

References
----------
.. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
.. [2] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from numpy.typing import ArrayLike

from pvscan.diagnose.features import Features, Hits, confidence, fit_score, quality
from pvscan.robust import iqr, nanmin

__all__ = ["open_module_floor", "pattern_open_module", "pattern_open_string", "walk_along_row"]


def open_module_floor(rise: ArrayLike, sigma: float, z_min: float, prior: float,
                      rise_rel_sigma: float = 0.0) -> np.ndarray:
    """Least module rise [K] called an open module: a likelihood-ratio test.

    A healthy module's delta T scatters as ``N(0, sigma)`` (the module-to-module spread);
    an open module's as ``N(rise, s_open)`` with ``rise = eta * G / U`` (the heat of the
    power it no longer delivers) and ``s_open**2 = sigma**2 + (rise_rel_sigma * rise)**2``:
    the same spread plus the uncertainty of the rise itself (the heat-loss coefficient of
    the mounting, the operating efficiency, the irradiance the module got). With a prior
    share ``prior`` of open modules, the open hypothesis is the more probable above the
    root of

        ``ln(sigma / s_open) - (x - rise)**2 / (2 s_open**2) + x**2 / (2 sigma**2)
        = ln((1 - prior) / prior)``

    (Gaussian classes; with ``rise_rel_sigma = 0`` it is
    ``rise / 2 + sigma**2 * ln((1 - prior) / prior) / rise``); the floor is that, and at
    least ``z_min * sigma``. When the rise is many spreads the floor sits near half the
    rise; when it is only a few (low irradiance, strong wind) it climbs above the rise,
    since then a warm healthy module is likelier than an open one.

    Parameters
    ----------
    rise : array-like
        Open-module rise at each module [K].
    sigma : float
        Robust spread of healthy modules' delta T [K].
    z_min : float
        Least floor in spreads [-].
    prior : float
        Prior share of open modules among modules (0..1) [-].
    rise_rel_sigma : float
        Relative uncertainty of the open-module rise (1 sigma) [-].

    Returns
    -------
    ndarray
        Floor [K].
    """
    r = np.maximum(np.asarray(rise, float), 1e-6)
    p = float(np.clip(prior, 1e-9, 0.5))
    big_l = np.log((1.0 - p) / p)
    sig = max(float(sigma), 1e-6)
    s2 = sig * sig + (float(rise_rel_sigma) * r) ** 2
    a = 0.5 * (1.0 / (sig * sig) - 1.0 / s2)
    b = r / s2
    c = -r * r / (2.0 * s2) + 0.5 * np.log(sig * sig / s2) - big_l
    with np.errstate(invalid="ignore", divide="ignore"):
        quad = (-b + np.sqrt(np.maximum(b * b - 4.0 * a * c, 0.0))) / (2.0 * a)
    lin = r / 2.0 + sig * sig * big_l / r
    lr = np.where(a > 1e-12, quad, lin)
    return np.maximum(z_min * sig, lr)


def pattern_open_module(F: Features, cfg: Mapping, rsub: np.ndarray | None = None, dT: np.ndarray | None = None,
                        isolated: bool = True) -> Hits:
    """A whole module raised uniformly by about the open-module rise ``eta * G / U``.

    Parameters
    ----------
    F : Features
    cfg : mapping
        ``[classify]`` settings (``open_ratio_min``, ``open_ratio_max``, ``open_uniform_iqr``,
        ``open_uniform_floor_k``, ``substring_raise_min``).
    rsub, dT : ndarray, optional
        Substring and module residuals against another reference (used by the open-string
        test, whose reference excludes the string itself).
    isolated : bool
        Require that no module touching this one is raised as much (a raised area that
        carries on into the next module is an image artefact such as a mosaic seam, or
        a run of open modules, which :func:`pattern_open_string` judges).

    Returns
    -------
    Hits
        Region ``module``, box (0, 1, 0, 1); region temperature = the module's median.
    """
    rsub = F.Rsub if rsub is None else rsub
    dT = F.dT if dT is None else dT
    r = F.rise
    lo = nanmin(rsub, axis=1)
    ratio = dT / r
    spread = iqr((F.R - F.base[:, None, None]).reshape(F.n, -1), axis=1)
    uniform = spread <= np.maximum(float(cfg["open_uniform_iqr"]) * r, float(cfg["open_uniform_floor_k"]))
    floor = open_module_floor(r, F.sig_mod, float(cfg["module_z"]), float(cfg["open_prior"]),
                              float(cfg["open_rise_rel_sigma"]))
    hit = (F.ok & (lo >= float(cfg["substring_raise_min"]) * r) & (ratio >= float(cfg["open_ratio_min"]))
           & (ratio <= float(cfg["open_ratio_max"])) & uniform & (dT >= floor))
    if isolated and "adjacent" in F.extra:
        hit &= ~_carried(F, cfg, dT, hit)
    conf = confidence(fit_score(ratio), quality(dT, floor))
    h = Hits("open_module", hit, conf, F.ref + dT)
    for i in np.flatnonzero(hit).tolist():
        h.region[i] = "module"
        h.boxes[i] = [(0.0, 1.0, 0.0, 1.0)]
    return h


def open_string_min_len(F: Features, cfg: Mapping) -> int:
    """Fewest modules of a run :func:`pattern_open_string` calls an open string: a table row
    standing in for unknown strings needs ``open_string_row_min_modules`` (an open module beside
    a healthy module a spread warm would make a run of two), a string ``open_string_min_modules``."""
    min_len = int(cfg["open_string_min_modules"])
    if not F.extra.get("is_string", False):
        min_len = max(min_len, int(cfg["open_string_row_min_modules"]))
    return min_len


def _carried(F: Features, cfg: Mapping, dT: np.ndarray, hit: np.ndarray) -> np.ndarray:
    """Modules whose raise carries on into a module touching them: not open modules by themselves.

    A neighbour raised by at least ``open_module_carried_share`` (a half) of the module's raise
    over the module's reference means a
    raised area larger than the module: an image artefact (a mosaic seam) or a run of open
    modules, which :func:`pattern_open_string` judges. That hand-over holds only where an open
    string could take the module: when the stretch of such modules along the module's string
    (or table row) is shorter than :func:`open_string_min_len` (or string patterns are not run,
    ``F.extra["groups"]`` absent), a neighbour along it carries the module only when raised at
    least as much as the module itself (the module is then the shoulder of a warmer one, not
    its peak). A neighbour outside the string (the table's other row) carries it as before.
    """
    adj = F.extra["adjacent"]
    share = float(cfg["open_module_carried_share"])
    base = F.t_median - dT
    t_adj = np.where(adj >= 0, F.t_median[np.maximum(adj, 0)], np.nan)
    with np.errstate(invalid="ignore"):
        lift = t_adj - base[:, None]
        half = lift >= share * dT[:, None]
        carried = half.any(axis=1)
    groups, pos = F.extra.get("groups"), F.extra.get("pos")
    if groups is None or pos is None:
        return carried
    min_len = open_string_min_len(F, cfg)
    jj = np.maximum(adj, 0)
    same = (adj >= 0) & (groups[jj] == groups[:, None]) & (groups[:, None] >= 0)
    for i in np.flatnonzero(hit & carried).tolist():
        if (half[i] & ~same[i]).any():
            continue
        idx = np.flatnonzero(groups == groups[i])
        idx = idx[np.argsort(pos[idx], kind="stable")]
        with np.errstate(invalid="ignore"):
            raised = (F.t_median[idx] - base[i]) >= share * dT[i]
        k = int(np.flatnonzero(idx == i)[0])
        lo_k, hi_k = k, k + 1
        while lo_k > 0 and raised[lo_k - 1]:
            lo_k -= 1
        while hi_k < len(idx) and raised[hi_k]:
            hi_k += 1
        if hi_k - lo_k >= min_len:
            continue
        with np.errstate(invalid="ignore"):
            carried[i] = bool((lift[i] >= dT[i]).any())
    return carried


def _runs(mask_sorted: np.ndarray) -> list[tuple[int, int]]:
    """(start, stop) of runs of True in a 1-D boolean array."""
    d = np.diff(np.concatenate([[0], mask_sorted.astype(np.int8), [0]]))
    return list(zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1)))


def _fill_gaps(mask: np.ndarray) -> np.ndarray:
    """Close single-module gaps in a run (one module below the bar between two above)."""
    out = mask.copy()
    if mask.size >= 3:
        out[1:-1] |= mask[:-2] & mask[2:]
    return out


def pattern_open_string(F: Features, cfg: Mapping, groups: np.ndarray, pos: np.ndarray) -> list[list[int]]:
    """Runs of consecutive modules of one string (or table row) all raised like open modules.

    An open string (blown fuse, open connector, tripped input) leaves all its modules
    delivering nothing, each ``eta * G / U`` warmer. Its modules are each other's
    neighbours, so they are judged against a reference that excludes their own string
    or row (``F.extra["d_other"]``, ``F.extra["rsub_other"]``). Candidates are modules
    raised uniformly by at least ``open_string_candidate_z`` robust standard deviations;
    runs of consecutive candidates (single gaps closed) count when their combined
    evidence ``sum(z) / sqrt(n)`` reaches ``open_string_run_z`` and their median rise fits
    the open-module rise.

    Parameters
    ----------
    F : Features
    cfg : mapping
    groups, pos : ndarray
        Group code (string, else table row; -1 none) and position along it.

    Returns
    -------
    list of list of int
        Module indices of each run, in string order (at least ``open_string_min_modules``).
    """
    d_o = F.extra["d_other"]
    rsub_o = F.extra["rsub_other"]
    sig = max(F.extra["sig_other"], float(cfg["other_spread_floor_k"]))
    r = F.rise
    z = d_o / sig
    lo = nanmin(rsub_o, axis=1)
    spread = iqr((F.R - F.base[:, None, None]).reshape(F.n, -1), axis=1)
    # uniformity also against the shape of all neighbours, suspects included (the first
    # pass): the modules of an open string share its raise and any image artefact that
    # crosses the row, such as a mosaic seam's edge, which neighbours outside it do not
    if "spread_all" in F.extra:
        spread = np.fmin(spread, F.extra["spread_all"])
    uniform = spread <= np.maximum(float(cfg["open_uniform_iqr"]) * r, float(cfg["open_uniform_floor_k"]))
    with np.errstate(invalid="ignore"):
        cand = (F.ok & (z >= float(cfg["open_string_candidate_z"])) & uniform
                & (lo >= 0.5 * float(cfg["substring_raise_min"]) * r)
                & (d_o <= float(cfg["open_ratio_max"]) * r))
    out = []
    min_len = open_string_min_len(F, cfg)
    for g in np.unique(groups[cand & (groups >= 0)]):
        idx = np.flatnonzero(groups == g)
        idx = idx[np.argsort(pos[idx], kind="stable")]
        c = _fill_gaps(cand[idx]) & F.ok[idx]
        if not F.extra.get("is_string", False):
            # a table row standing in for unknown strings holds several strings: a module between
            # two raised stretches that is not raised itself (open_string_end_z) is where one
            # string ends, not a dip in an open one (all of whose modules carry no current)
            with np.errstate(invalid="ignore"):
                c &= cand[idx] | (z[idx] >= float(cfg["open_string_end_z"]))
        long_runs = [(a, b) for a, b in _runs(c) if b - a >= min_len]
        for a, b in long_runs:
            run = idx[a:b]
            zc = float(np.nansum(z[run]) / np.sqrt(len(run)))
            ratio = float(np.nanmedian(d_o[run]) / np.nanmedian(r[run]))
            if zc >= float(cfg["open_string_run_z"]) and ratio >= float(cfg["open_string_ratio_min"]):
                # an established run takes in end modules of its string that are raised,
                # if less clearly (an open string is normally the whole string); a table row
                # standing in for unknown strings is not a string, so its run is not extended so
                # (a healthy neighbour a spread warm would join it one time in six) ...
                lo_end, hi_end = a, b
                end_z = float(cfg["open_string_end_z"]) if F.extra.get("is_string", False) else np.inf
                while lo_end > 0 and F.ok[idx[lo_end - 1]] and z[idx[lo_end - 1]] >= end_z:
                    lo_end -= 1
                while hi_end < len(idx) and F.ok[idx[hi_end]] and z[idx[hi_end]] >= end_z:
                    hi_end += 1
                if not F.extra.get("is_string", False):
                    # ... but a run that stops at most open_string_row_end_modules short of
                    # its row's end takes in those end modules when they are raised beyond
                    # what a neighbour of an open string may be (open_string_beyond_max of the
                    # run's raise): the module at a row's end is the most open to the wind and
                    # runs cooler, and would otherwise, raised, reject the run as carrying on
                    n_end = int(cfg["open_string_row_end_modules"])
                    lim = float(cfg["open_string_beyond_max"]) * float(np.nanmedian(d_o[run]))
                    with np.errstate(invalid="ignore"):
                        if 0 < a <= n_end and bool((F.ok[idx[:a]] & (d_o[idx[:a]] > lim)).all()):
                            lo_end = 0
                        if 0 < len(idx) - b <= n_end and bool((F.ok[idx[b:]] & (d_o[idx[b:]] > lim)).all()):
                            hi_end = len(idx)
                    # (the rest of the row holding no other run, which is judged by itself)
                    if a == long_runs[0][0] and _raised_to_the_row_end(F, cfg, z, idx[:a], b - a):
                        lo_end = 0
                    if b == long_runs[-1][1] and _raised_to_the_row_end(F, cfg, z, idx[b:], b - a):
                        hi_end = len(idx)
                # the end modules taken in are less clear (a healthy module is above
                # open_string_end_z now and then): when the run with them fails a check of
                # the whole run, the established run is judged alone. The checks against the
                # modules beside the run are of the run with them: an open string whose middle
                # modules fell below open_string_candidate_z is established in part, and the
                # rest of it, beside that part, is as warm
                for lo_i, hi_i in dict.fromkeys([(lo_end, hi_end), (a, b)]):
                    run = idx[lo_i:hi_i]
                    if _raise_carries_on(F, run) or not _stands_out_of_its_row(
                            F, run, float(cfg["open_string_row_radius_m"]), float(cfg["open_string_row_share"])):
                        continue
                    if F.extra.get("is_string", False) and not _string_opens_whole(F, cfg, idx, run):
                        continue
                    if not _raised_over_other_row_throughout(F, cfg, run):
                        continue
                    if not _stops_at_its_ends(F, cfg, run):
                        continue
                    out.append([int(i) for i in run])
                    break
    return out


def _raised_to_the_row_end(F: Features, cfg: Mapping, z: np.ndarray, tail: np.ndarray, n_run: int) -> bool:
    """True when every module from a run to its table row's end is raised: the same open row.

    Along a table row standing in for unknown strings, a run that stops short of the row's
    end while the raise goes on, module after module, to that end is an open row whose end
    lies under an image artefact (a mosaic seam, a cloud shadow's edge) that spoils the
    candidates' uniformity there, not a seam that carries on past an open string: no module of
    an open string carries current (IEC TS 62446-3, from memory), and a seam does not stop at
    a row's end. The tail (``tail``, modules in row order, at least one) counts when it is
    at most ``open_string_row_tail_share`` of the run's length (``n_run`` modules: the
    established run is most of the row), every
    module of it is classified and raised by at least ``open_string_candidate_z`` robust
    standard deviations over modules outside the row, and its median raise is at least
    ``open_string_ratio_min`` of its median open-module rise (the run's own bar).
    """
    if tail.size == 0 or tail.size > float(cfg["open_string_row_tail_share"]) * n_run:
        return False
    d_o = F.extra["d_other"][tail]
    with np.errstate(invalid="ignore"):
        raised = F.ok[tail] & (z[tail] >= float(cfg["open_string_candidate_z"]))
        level = float(np.nanmedian(d_o) / np.nanmedian(F.rise[tail]))
    return bool(raised.all()) and level >= float(cfg["open_string_ratio_min"])


def _raised_over_other_row_throughout(F: Features, cfg: Mapping, run: np.ndarray) -> bool:
    """False when part of the run is not raised over the modules beside it in the other row.

    An open string carries no current in any of its modules, so each one runs about the
    open-module rise above the healthy module beside it in the table's other row. A mosaic
    seam whose edge runs between two rows of a table and ends part-way along them raises
    one row over the other only where the seam is. The share of the run's modules less
    than ``open_string_cross_min`` of the rise above their other-row neighbour (the mean
    difference of the module and the run's modules on either side of it, which the
    module-to-module spread of one module alone does not decide) may be at most
    ``open_string_cross_fail_max`` (defects are sparse: a defective neighbour is rare).
    The differences are taken relative to how the two rows compare beside the run (the
    median difference of the run's own table row outside it, at least three modules; zero
    when fewer): a seam or a shadow edge over the whole of one row shifts both alike.
    """
    cross = F.extra.get("cross_row")
    if cross is None:
        return True
    run = np.asarray(run)
    j = cross[run]
    members = set(run.tolist())
    usable = np.array([jj >= 0 and int(jj) not in members for jj in j], bool)
    if usable.any():
        jj = np.maximum(j, 0)
        usable &= F.ok[jj] & np.isfinite(F.t_median[jj])
    if usable.sum() < 3:
        return True
    r = run[usable]
    diff = F.t_median[r] - F.t_median[cross[r]]
    row_key = F.extra.get("row_key")
    if row_key is not None and row_key[run[0]] >= 0:
        beside = np.flatnonzero(row_key == row_key[run[0]])
        beside = beside[~np.isin(beside, run) & (cross[beside] >= 0)]
        beside = beside[~np.isin(cross[beside], run)]
        beside = beside[F.ok[beside] & F.ok[cross[beside]]]
        d_beside = F.t_median[beside] - F.t_median[cross[beside]]
        d_beside = d_beside[np.isfinite(d_beside)]
        if d_beside.size >= 3:
            diff = diff - float(np.median(d_beside))
    # each module with its neighbours along the run (a window of three, two at the run's ends):
    # a seam's edge leaves a stretch of the run unraised, which the window keeps, while one
    # module read low by the module-to-module spread is carried by the two beside it
    fin = np.isfinite(diff)
    num = np.convolve(np.where(fin, diff, 0.0), np.ones(3), mode="same")
    cnt = np.convolve(fin.astype(float), np.ones(3), mode="same")
    with np.errstate(invalid="ignore", divide="ignore"):
        low = num / cnt < float(cfg["open_string_cross_min"]) * F.rise[r]
    return float(low.mean()) <= float(cfg["open_string_cross_fail_max"])


def _stops_at_its_ends(F: Features, cfg: Mapping, run: np.ndarray) -> bool:
    """False when the raise goes on into the module just past an end of the run.

    An open string's raise stops where the string stops: the next module along the row,
    of another string, carries current and runs no warmer than its neighbours. A mosaic
    seam does not care where strings end. The module past each end (same table row) may be
    raised by at most ``open_string_beyond_max`` of the run's median raise: the mean of its
    raise over the module beside it in the other row and over modules outside its string
    (the latter alone where there is no other row).
    """
    along = F.extra.get("along_row")
    cross = F.extra.get("cross_row")
    if along is None:
        return True
    run = np.asarray(run)
    members = set(run.tolist())
    t = F.t_median
    has = cross[run] >= 0 if cross is not None else np.zeros(len(run), bool)
    raise_run = (float(np.nanmedian(t[run[has]] - t[cross[run[has]]]))
                 if cross is not None and has.sum() >= max(1, len(run) // 2)
                 else float(np.nanmedian(F.extra["d_other"][run])))
    if not np.isfinite(raise_run) or raise_run <= 0:
        return True
    limit = float(cfg["open_string_beyond_max"]) * raise_run
    for end in (int(run[0]), int(run[-1])):
        for j in along[end]:
            j = int(j)
            if j < 0 or j in members or not F.ok[j]:
                continue
            beyond = float(F.extra["d_other"][j])
            if cross is not None and cross[j] >= 0 and int(cross[j]) not in members and F.ok[cross[j]]:
                beyond = float(np.nanmean([t[j] - t[cross[j]], beyond]))
            if np.isfinite(beyond) and beyond > limit:
                return False
    return True


def _string_opens_whole(F: Features, cfg: Mapping, members: np.ndarray, run: np.ndarray) -> bool:
    """False when the string's modules outside the run are clearly not open.

    An open string carries no current in any of its modules, so all of them run
    ``eta * G / U`` warmer; a run that covers only part of a string while at least two
    other classified modules of it sit at a fraction ``open_string_rest_max`` of the rise
    or less (median, against modules outside the string) is something else (a cloud
    shadow or a seam raising part of a row over the neighbouring rows).
    """
    rest = np.setdiff1d(np.asarray(members), np.asarray(run))
    rest = rest[F.ok[rest] & np.isfinite(F.extra["d_other"][rest])]
    if rest.size < 2:
        return True
    level = float(np.median(F.extra["d_other"][rest]))
    return level >= float(cfg["open_string_rest_max"]) * float(np.nanmedian(F.rise[run]))


def _stands_out_of_its_row(F: Features, run: np.ndarray, radius_m: float = 5.0, share: float = 0.35) -> bool:
    """False when the run is not warmer than the rest of its own table row nearby.

    The out-of-string reference comes from other rows, which under an irradiance gradient
    (a cloud shadow's edge) can sit lower; the modules of the run's own row outside it,
    within ``radius_m`` [m] of it, share its irradiance (the nearest ones best; farther
    along, a mosaic seam crossing the row would decide). The run's median must exceed
    theirs by ``share`` of its raise over the other rows. Runs that fill their row are
    not checked.
    """
    key = F.extra.get("row_key")
    if key is None:
        return True
    run = np.asarray(run)
    k = key[run[0]]
    if k < 0:
        return True
    xy = F.extra["centre"]
    mates = np.flatnonzero((key == k) & F.ok)
    mates = mates[~np.isin(mates, run)]
    if mates.size:
        d = np.min(np.linalg.norm(xy[mates][:, None, :] - xy[run][None, :, :], axis=2), axis=1)
        mates = mates[d <= radius_m]
    if mates.size < 3:
        return True
    own = float(np.nanmedian(F.t_median[run]) - np.nanmedian(F.t_median[mates]))
    return own >= share * float(np.nanmedian(F.extra["d_other"][run]))


def _raise_carries_on(F: Features, run: np.ndarray) -> bool:
    """True when a run's raise over the other row of its table carries on past its ends.

    An open string stops where the string stops; a mosaic seam running along a table row
    raises the modules beyond the run as well.
    """
    cross = F.extra.get("cross_row")
    along = F.extra.get("along_row")
    if cross is None or along is None:
        return False
    t = F.t_median
    run = np.asarray(run)
    has = cross[run] >= 0
    if has.sum() < max(1, len(run) // 2):
        return False
    d_run = float(np.nanmedian(t[run[has]] - t[cross[run[has]]]))
    if not np.isfinite(d_run) or d_run <= 0.3 * float(np.nanmedian(F.rise[run])):
        return False
    members = set(run.tolist())
    for start in {int(j) for i in run for j in along[i] if j >= 0 and int(j) not in members}:
        # walk up to three modules along the row away from the run; compare their mean
        # offset over the other row with the run's (one module alone is too noisy)
        line = walk_along_row(along, start, members, 3)
        diffs = [t[b] - t[cross[b]] for b in line if cross[b] >= 0]
        diffs = [x for x in diffs if np.isfinite(x)]
        if len(diffs) >= 2 and float(np.mean(diffs)) >= 0.6 * d_run:
            return True
    return False


def walk_along_row(along: np.ndarray, start: int, exclude: set[int], k: int) -> list[int]:
    """Up to ``k`` modules along a table row from ``start`` away from the modules ``exclude``.

    ``along``: (n, 4) indices of the modules touching each one in its own table row (-1 none).
    """
    seen, cur = set(exclude), int(start)
    line: list[int] = []
    while cur >= 0 and len(line) < k and cur not in seen:
        seen.add(cur)
        line.append(cur)
        nxt = [int(j) for j in along[cur] if j >= 0 and int(j) not in seen]
        cur = nxt[0] if nxt else -1
    return line
