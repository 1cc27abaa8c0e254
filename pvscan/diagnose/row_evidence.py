"""What the classification measures about a flight's table rows as a whole (``Diagnosis.evidence``).

:func:`row_clusters` (how unlikely the densest stretch of findings along a row is), :func:`row_edges`
(how far a row's edge cells depart from the rows like it) and :func:`cold_runs` (the coldest run of
neighbouring modules against their references): read by the validity checks of
:mod:`pvscan.measure.evidence_checks`, which fail a flight whose rows show what no fault makes.
"""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from pvscan.diagnose.features import Features
from pvscan.robust import nanmedian

__all__ = ["row_clusters", "row_edges", "cold_runs"]


def row_clusters(modules: pd.DataFrame, defect: np.ndarray, ok: np.ndarray,
                  cfg: Mapping[str, Any]) -> dict[str, Any]:
    """How unlikely the densest stretch of findings along a table row is, were the findings
    independent from module to module.

    Faults of cells, bypass diodes and junction boxes (``[classify] cluster_kinds``) strike
    module by module; an image artefact along a row (a mosaic seam running through the
    modules, a reflection) marks a stretch of neighbours. With ``p`` the flight's share of
    classified modules holding such a finding, every stretch of at least three modules of every
    table row (modules ordered by ``table_col``) holding ``k`` of them among ``n`` classified
    modules has the binomial chance ``P(X >= k)``, ``X ~ Bin(n, p)``; the least of them, times
    the number of stretches tested (Bonferroni), is the chance of so dense a stretch anywhere
    on the flight. Returns ``row_cluster_score`` = -log10 of that chance (0 when fewer than
    three findings), and where the stretch is (``row_cluster_modules`` [module ids],
    ``row_cluster_findings``, ``row_cluster_rate``).
    """
    from scipy.special import bdtrc

    from pvscan.measure.rows import row_keys

    kinds = set(cfg["cluster_kinds"])
    hit = np.array([d in kinds for d in defect], bool) & ok
    out: dict[str, Any] = {"row_cluster_score": 0.0, "row_cluster_modules": [], "row_cluster_findings": 0,
                           "row_cluster_rate": float(hit.sum() / max(int(ok.sum()), 1))}
    if hit.sum() < 3 or "table_col" not in modules.columns:
        return out
    p = out["row_cluster_rate"]
    keys = row_keys(modules)
    col = pd.to_numeric(modules["table_col"], errors="coerce").to_numpy(dtype=float)
    use = np.flatnonzero((keys >= 0) & np.isfinite(col))
    order = use[np.lexsort((col[use], keys[use]))]
    rows = np.split(order, np.flatnonzero(np.diff(keys[order])) + 1)
    best_p, best, n_tests = 1.0, None, 0
    for mem in rows:
        if len(mem) < 3:
            continue
        c_hit = np.concatenate([[0], np.cumsum(hit[mem])])
        c_ok = np.concatenate([[0], np.cumsum(ok[mem])])
        a, b = np.triu_indices(len(mem) + 1, k=3)
        n_tests += len(a)
        k = c_hit[b] - c_hit[a]
        sel = k >= 3
        if not sel.any():
            continue
        # P(X >= k) = P(X > k - 1), X ~ Bin(n, p); bdtrc is NaN where k > n, a chance of 0
        n_ok = c_ok[b][sel] - c_ok[a][sel]
        pv = np.where(k[sel] > n_ok, 0.0, bdtrc(k[sel] - 1, n_ok, p))
        j = int(np.argmin(pv))
        if pv[j] < best_p:
            best_p, best = float(pv[j]), (mem, int(a[sel][j]), int(b[sel][j]), int(k[sel][j]))
    if best is None:
        return out
    mem_b, a_b, b_b, k_b = best
    ids = modules["module_id"].astype(str).to_numpy() if "module_id" in modules else np.arange(len(modules)).astype(str)
    out.update(row_cluster_score=float(0.0 - np.log10(max(min(best_p * n_tests, 1.0), 1e-300))),
               row_cluster_modules=[str(x) for x in ids[mem_b[a_b:b_b]]], row_cluster_findings=k_b)
    return out


def cold_runs(modules: pd.DataFrame, delta_t_k: np.ndarray, F: Features, cfg: Mapping[str, Any]) -> dict[str, Any]:
    """The coldest run of neighbouring modules along a table row, against their references.

    Along every table row (classified modules ordered by ``table_col``), each run of
    ``[classify] cold_run_modules`` neighbours is as cold as its warmest module; the coldest run
    of the flight, as that module's ``-delta_t_k`` over the module-to-module spread ``sig_mod``
    (``cold_run_z`` [robust SD], 0 when no run is colder than its reference), where it is
    (``cold_run_modules``) and its warmest module's delta T (``cold_run_k`` [K]).

    A PV module's faults all turn power it no longer delivers into heat (IEC TS 62446-3; common
    practice): no fault makes a module run colder than its producing neighbours. Several
    neighbours far colder than their references are the image's doing: a mosaic seam or a
    reflection of the cold sky the levelling of :mod:`pvscan.measure.seams` did not take (a
    stretch running to a row's end, a one-row table), or one it levelled by too much (a stretch
    over a warm string and healthy modules levelled by their common median). The same artefact
    shifts the modules beside them, whose findings (an open string under a seam, a warm string
    levelled away) are then not measured.
    """
    from pvscan.measure.rows import row_keys

    m = int(cfg["cold_run_modules"])
    out: dict[str, Any] = {"cold_run_z": 0.0, "cold_run_modules": [], "cold_run_k": None}
    sig = float(F.sig_mod)
    if F.n == 0 or "table_col" not in modules.columns or not np.isfinite(sig) or sig <= 0:
        return out
    dt = np.asarray(delta_t_k, dtype=float)
    keys = row_keys(modules)
    col = pd.to_numeric(modules["table_col"], errors="coerce").to_numpy(dtype=float)
    use = np.flatnonzero((keys >= 0) & np.isfinite(col) & F.ok & np.isfinite(dt))
    order = use[np.lexsort((col[use], keys[use]))]
    ids = modules["module_id"].astype(str).to_numpy() if "module_id" in modules else np.arange(len(modules)).astype(str)
    best = 0.0
    for mem in np.split(order, np.flatnonzero(np.diff(keys[order])) + 1):
        if len(mem) < m:
            continue
        warmest = np.lib.stride_tricks.sliding_window_view(dt[mem], m).max(axis=1)
        j = int(np.argmin(warmest))
        if -warmest[j] / sig > best:
            best = float(-warmest[j] / sig)
            out.update(cold_run_z=best, cold_run_modules=[str(x) for x in ids[mem[j:j + m]]],
                       cold_run_k=float(warmest[j]))
    return out


def row_edges(modules: pd.DataFrame, F: Features, cfg: Mapping[str, Any]) -> dict[str, Any]:
    """How far a table row's edge cells depart from those of the rows like it.

    Each module's edge lines of cells (the line along each long edge, ``v = 0`` and ``v = 1``,
    and the first two lines at each end, ``u = 0`` and ``u = 1``: the narrow end cells of half-cut
    modules may be lost to the edge margin), as the line's median minus the median of all the
    module's cells [K] (its own shape, no reference); a line with less than ``[classify]
    row_edge_min_measured_share`` of its cells measured is left out. Per table row, the median over
    its classified modules (rows of at least ``[classify] row_edge_min_modules`` of them), compared
    with the median of the rows at the same position in their tables (``table_row``; all rows when
    fewer than ``[classify] row_edge_min_rows`` share it).

    Every row of a plant sees its edges alike (the same glass, frame and gap); a row whose
    footprints sit a few centimetres across its modules (relief displacement the placement of
    whole tables cannot follow, a mosaic seam shifting part of a table) puts one edge line on
    the gap and the ground beside it, which reads far off, and every cell-level pattern of that
    row is then not measured. A defect strikes single modules, which the row's median ignores.

    Returns ``row_edge_offset_k`` [K] (the largest absolute departure; 0 with fewer than two rows),
    ``row_edge_modules`` (the row's classified module ids), ``row_edge_line`` (which line)
    and ``row_edge_line_k`` / ``row_edge_reference_k`` [K] (the row's median and its reference).
    """
    from pvscan.measure.rows import row_keys

    out: dict[str, Any] = {"row_edge_offset_k": 0.0, "row_edge_modules": [], "row_edge_line": None,
                           "row_edge_line_k": None, "row_edge_reference_k": None}
    n, A, C = F.n, F.n_along, F.n_across
    if n == 0 or A < 4 or C < 2:
        return out
    X = F.cm - np.asarray(F.t_median, dtype=float)[:, None, None]
    whole = nanmedian(X.reshape(n, -1), axis=1)
    names = ("u = 0 end", "u = 0 end, second line", "u = 1 end, second line", "u = 1 end", "v = 0 edge", "v = 1 edge")
    lines = [X[:, 0, :], X[:, 1, :], X[:, A - 2, :], X[:, A - 1, :], X[:, :, 0], X[:, :, C - 1]]
    side = np.full((n, len(lines)), np.nan)
    min_share = float(cfg["row_edge_min_measured_share"])
    for k, L in enumerate(lines):
        measured = np.isfinite(L).mean(axis=1) >= min_share
        side[:, k] = np.where(measured, nanmedian(L, axis=1) - whole, np.nan)
    keys = row_keys(modules)
    pos = (pd.to_numeric(modules["table_row"], errors="coerce").to_numpy(dtype=float)
           if "table_row" in modules.columns else np.full(n, np.nan))
    min_mod = int(cfg["row_edge_min_modules"])
    rows, meds, where = [], [], []
    for r in np.unique(keys[keys >= 0]):
        mem = np.flatnonzero((keys == r) & F.ok)
        if len(mem) < min_mod:
            continue
        rows.append(mem)
        with np.errstate(all="ignore"):
            meds.append(nanmedian(side[mem], axis=0))
        where.append(float(np.nanmedian(pos[mem])) if np.isfinite(pos[mem]).any() else np.nan)
    if len(rows) < 2:
        return out
    meds_a = np.asarray(meds)
    where_a = np.asarray(where)
    ids = modules["module_id"].astype(str).to_numpy() if "module_id" in modules else np.arange(n).astype(str)
    best = 0.0
    min_rows = int(cfg["row_edge_min_rows"])
    for j, mem in enumerate(rows):
        same = (where_a == where_a[j]) if np.isfinite(where_a[j]) else np.zeros(len(rows), bool)
        ref = nanmedian(meds_a[same], axis=0) if same.sum() >= min_rows else nanmedian(meds_a, axis=0)
        dev = meds_a[j] - ref
        if not np.isfinite(dev).any():
            continue
        k = int(np.nanargmax(np.abs(dev)))
        if abs(dev[k]) > best:
            best = float(abs(dev[k]))
            out.update(row_edge_offset_k=best, row_edge_modules=sorted(str(x) for x in ids[mem]),
                       row_edge_line=names[k], row_edge_line_k=float(meds_a[j, k]),
                       row_edge_reference_k=float(ref[k]))
    return out
