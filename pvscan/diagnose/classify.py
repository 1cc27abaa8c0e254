"""Defect classification: the pattern tests run in two passes, then one class per module.

1. :mod:`pvscan.diagnose.features` gathers each module's residual cells, substrings and
   rise against its healthy neighbours, and the open-module yardstick ``eta * G / U(v)``;
2. the pattern tests of :mod:`pvscan.diagnose.patterns` (one module per family) return the
   modules they recognise, the region, its temperature and a confidence;
3. string-level patterns on top: a run of consecutive open modules of one string (or table
   row) is one ``open_string``, judged against a reference that excludes the string itself;
   potential-induced degradation (``pid``) is a string whose modules near the negative end
   run warmer with an edge-weighted cell pattern; each is one anomaly over its modules;
4. overlapping patterns get one class (``precedence``) with the others listed in
   ``other_defects``, then :func:`pvscan.diagnose.severity.assign_severity` sets ``severity``.

Two passes: the first finds suspects, which are then excluded from every neighbour's
reference before the second, final pass. The module's reference, ``delta_t_k`` and
``delta_t_norm_k`` come from the thermal stage (:mod:`pvscan.diagnose.thermal`).

References
----------
.. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
.. [2] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
"""
from __future__ import annotations

import logging
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
import pandas as pd

from pvscan.diagnose.features import (
    Features,
    Hits,
    build_features,
    confidence,
    fit_score,
    neighbour_median,
    quality,
    row_geometry,
    string_groups,
)
from pvscan.diagnose.patterns import (
    pattern_bypassed_substring,
    pattern_hot_cell,
    pattern_junction_box,
    pattern_open_module,
    pattern_open_string,
    pattern_pid,
    pattern_soiling,
    walk_along_row,
)
from pvscan.diagnose.patterns.pid import (
    excess_z,
    extension_evidence,
    unexplained_string_pattern,
    unexplained_tail_evidence,
)
from pvscan.diagnose.results import ANOMALY_COLUMNS, Diagnosis
from pvscan.diagnose.severity import assign_severity
from pvscan.diagnose.thermal import Normalisation, condition_column, local_reference, module_thermal
from pvscan.io.settings import section
from pvscan.physics.heat import Faiman
from pvscan.robust import iqr, nanmedian, scaled_mad

__all__ = ["classify"]

logger = logging.getLogger(__name__)


def _detect(F: Features, cfg: Mapping[str, Any], final: bool = True) -> list[Hits]:
    hits = [pattern_open_module(F, cfg)]
    hits += list(pattern_bypassed_substring(F, cfg, final=final))
    hits += list(pattern_hot_cell(F, cfg))
    hits.append(pattern_junction_box(F, cfg))
    hits.append(pattern_soiling(F, cfg))
    return hits


def _stage(modules: pd.DataFrame, stats: Any, conditions: pd.DataFrame, module_spec: Any,
           cfg: Mapping[str, Any], cfg_ref: Mapping[str, Any], heat: Faiman, ok: np.ndarray,
           healthy: np.ndarray, groups: np.ndarray, pos: np.ndarray, is_string: bool,
           final: bool = True, spread_all: np.ndarray | None = None,
           geometry: dict[str, np.ndarray] | None = None,
           string_patterns: bool = True, spread_from: np.ndarray | None = None,
           max_other_ratio: float = np.inf) -> tuple[Features, list[Hits]]:
    """One pass: references (own row, and outside the own string), features, module patterns,
    open strings. ``spread_from``: the modules whose delta T gives the module spread
    (:func:`pvscan.diagnose.features.build_features`); ``max_other_ratio``: the reference outside
    the string scattering more than this many module spreads is not used to confirm an open
    module (``[validity] max_other_spread_ratio``, the bar of the ``string_reference`` check)."""
    t_med = stats.table["t_median_c"].to_numpy(dtype=float)
    rr = local_reference(modules, t_med, healthy, cfg_ref, return_details=True)
    # a reference that excludes the module's own string (or row): a whole string raised
    # together would otherwise be its own reference
    ro = local_reference(modules, t_med, healthy, cfg_ref, exclude_group=groups, return_details=True)
    ref_o = np.where(np.isfinite(ro.reference_c), ro.reference_c, rr.reference_c)
    F = build_features(modules, stats, conditions, module_spec, rr.reference_c, rr.neighbours, ok, cfg, cfg_ref,
                       heat, ref_irr=0.5 * (rr.reference_c + ref_o), spread_from=spread_from)
    F.extra["sub_median"] = np.asarray(stats.sub_median, dtype=np.float64)
    F.extra["suspect"] = rr.suspect
    if spread_all is not None:
        F.extra["spread_all"] = spread_all
    F.extra.update(row_geometry(modules, F.nsub) if geometry is None else geometry)
    F.extra["is_string"] = bool(is_string)
    if string_patterns:
        # the open-module test hands a raise shared along a string (or row) to the open-string test
        F.extra.update(groups=groups, pos=pos)
    hits = _detect(F, cfg, final=final)
    d_other = t_med - ref_o
    sig_o = scaled_mad(d_other[healthy & F.ok]) if (healthy & F.ok).sum() >= 3 else F.sig_mod
    # an open module is raised against both neighbourhoods: its row, and modules outside its
    # string (a reference biased by a shadow edge along the row is not both); not where the
    # reference outside the string scatters more than max_other_ratio module spreads (the flight's
    # string_reference check fails): that reference then says nothing about the module
    om = hits[0]
    reliable = not (np.isfinite(sig_o) and F.sig_mod > 0 and sig_o > max_other_ratio * F.sig_mod)
    if reliable:
        # the raise over modules outside the string counts from where the module's own row stands
        # against them on both sides of it (a seam or a shadow over the other row offsets that
        # reference for the whole stretch; a shadow edge crossing the row leaves one side level)
        off = _other_offset_both_sides(F, d_other, healthy & F.ok, int(cfg["open_other_side_modules"]),
                                       np.flatnonzero(om.hit))
        with np.errstate(invalid="ignore"):
            om.hit &= d_other - off >= float(cfg["open_other_share"]) * float(cfg["module_z"]) * F.sig_mod
    F.extra["other_reference_reliable"] = reliable
    rsub_o = F.Rsub + (F.ref - ref_o)[:, None]
    # the cell pattern against modules outside the string too: a string-long pattern (PID)
    # would otherwise be partly taken for the shape its neighbours share
    shape_o = np.nan_to_num(neighbour_median(F.cm - t_med[:, None, None], ro.neighbours), nan=0.0)
    F.extra["R_other"] = F.cm - ref_o[:, None, None] - shape_o
    F.extra["sig_other_measured"] = float(sig_o) if np.isfinite(sig_o) else float("nan")
    # no wider than other_spread_max_ratio module spreads: on a small plant a faulty string's own
    # offset (and the mirror offset of the row beside it) would widen it and hide the string
    sig_o = min(sig_o, float(cfg["other_spread_max_ratio"]) * F.sig_mod)
    F.extra.update(ref_other=ref_o, d_other=d_other, rsub_other=rsub_o,
                   sig_other=sig_o if np.isfinite(sig_o) else F.sig_mod)
    runs = pattern_open_string(F, cfg, groups, pos) if string_patterns else []
    in_run = np.zeros(F.n, bool)
    for run in runs:
        in_run[run] = True
    F.extra.update(open_runs=runs, in_run=in_run)
    return F, hits


def _other_offset_both_sides(F: Features, d_other: np.ndarray, healthy: np.ndarray, k: int,
                             which: np.ndarray) -> np.ndarray:
    """How far below the reference outside its string a module's own row stands on both sides [K].

    For each module of ``which``: the median raise over the reference outside the string
    (``d_other``) of up to ``k`` healthy modules along its table row on each side, and of the
    two sides the higher, when both sides have one and it is below zero; else 0 (a module at a
    row's end, or a row level with or above the other reference, is judged as before). A
    reference outside the string taken from a row under a mosaic seam, or out of a cloud
    shadow the module's row is in, stands above the whole stretch of the row; the edge of a
    shadow over the row (which biases the row reference) leaves one side of it level.
    """
    off = np.zeros(F.n)
    along = F.extra.get("along_row")
    if along is None or k <= 0:
        return off
    for i in which.tolist():
        sides = []
        for start in {int(j) for j in along[i] if j >= 0}:
            line = [j for j in walk_along_row(along, start, {int(i)}, k) if healthy[j] and np.isfinite(d_other[j])]
            if line:
                sides.append(float(np.median(d_other[line])))
        if len(sides) == 2:
            off[i] = min(0.0, max(sides))
    return off


def classify(modules: pd.DataFrame, stats: Any, conditions: pd.DataFrame, module_spec: Any,
             settings: Mapping[str, Any] | None = None, confidence_factor: float = 1.0,
             progress: Callable[[str, int, int], None] | None = None, *,
             string_patterns: bool = True) -> Diagnosis:
    """Classify every module: local reference, delta T, defect patterns and severity.

    Parameters
    ----------
    modules : GeoDataFrame
        Modules (``module_id``, ``table_id``, ``string_id``, ``string_index``, ``table_row``,
        ``table_col``, module-local frame, ``lower_edge``), projected CRS [m].
    stats : ZonalStats-like
        True glass temperatures [degC]: ``table`` (``t_median_c``, ``t_max_c``,
        ``valid_fraction`` ...), ``cell_median``, ``cell_p95``, ``cell_count``
        (n, n_along, n_across), ``sub_median``, ``sub_p95`` (n, bypass_diodes).
    conditions : DataFrame
        Aligned with the modules: ``poa_global`` [W/m2], ``temp_air`` [degC],
        ``wind_speed`` [m/s].
    module_spec : ModuleSpec-like
        ``efficiency``, ``bypass_diodes``, ``junction_box`` ("edge" | "split"), ...
    settings : Pipeline or mapping, optional
        Pipeline settings (sections ``heat``, ``reference``, ``classify``, ``severity``);
        keys left out take the defaults of ``pipelines/post_flight.toml``.
    confidence_factor : float
        0..1, multiplies every confidence (acquisition limits not met lower it).
    progress : callable, optional
        ``progress(stage, done, total)``.
    string_patterns : bool
        Run the string-level patterns (``open_string``, ``pid``). False when the modules'
        stringing is unknown and the table rows would only guess it (a layout detected in
        the ortho): their modules are then judged one by one.

    Returns
    -------
    Diagnosis
        ``anomalies`` (one row per anomaly, columns :data:`ANOMALY_COLUMNS`) and ``modules``
        (aligned with the modules: ``reference_c`` [degC], ``delta_t_k``,
        ``delta_t_norm_k`` [K], ``defect``, ``classified``, ``confidence``); unpacks as
        ``anomalies, module_table``.
    """
    cfg = section(settings, "classify")
    cfg_ref = section(settings, "reference")
    cfg_sev = section(settings, "severity")
    # the bar of the string_reference check: beyond it the reference outside the string is not used
    max_other_ratio = float(section(settings, "validity")["max_other_spread_ratio"])
    heat = Faiman.from_settings(section(settings, "heat"))
    norm = Normalisation.from_settings(settings)
    cf = float(np.clip(confidence_factor if confidence_factor is not None else 1.0, 0.0, 1.0))
    n = len(modules)
    if progress:
        progress("classify", 0, 3)
    table = stats.table
    vf = table["valid_fraction"].to_numpy(dtype=float) if "valid_fraction" in table else np.ones(n)
    t_med = table["t_median_c"].to_numpy(dtype=float)
    ok = np.isfinite(t_med) & (np.nan_to_num(vf, nan=0.0) >= float(cfg["min_valid_fraction"]))
    if (~ok).any():
        logger.info("%d of %d modules not classified (valid fraction below %.2f)",
                    int((~ok).sum()), n, float(cfg["min_valid_fraction"]))
    if n == 0:
        anomalies = assign_severity(pd.DataFrame(columns=ANOMALY_COLUMNS[:-2]), cfg_sev)[ANOMALY_COLUMNS]
        module_table = pd.DataFrame({"reference_c": [], "delta_t_k": [], "delta_t_norm_k": [],
                                     "defect": pd.Series([], dtype=object), "classified": pd.Series([], dtype=bool),
                                     "confidence": []}, index=modules.index)
        return Diagnosis(anomalies, module_table)
    groups, pos, is_string = string_groups(modules)
    # adjacency and row geometry depend on the layout alone: built once for both passes
    geometry = row_geometry(modules, int(np.shape(stats.sub_median)[1]))

    # pass 1: suspects
    F1, hits1 = _stage(modules, stats, conditions, module_spec, cfg, cfg_ref, heat, ok, ok, groups, pos,
                       is_string, final=False, geometry=geometry, string_patterns=string_patterns,
                       max_other_ratio=max_other_ratio)
    suspect = F1.extra["suspect"] | F1.extra["in_run"]
    # the modules of a run found in pass 1 have only suspects about them in their row, so pass 2
    # refers them to other rows and their delta T holds the whole open-module rise: a string of
    # a third of a small plant would then pass for the healthy modules' spread (and raise the
    # bar that finds it); the spread is taken without them
    not_run = ~F1.extra["in_run"]
    for h in hits1:
        suspect |= h.hit
    spread_all = iqr((F1.R - F1.base[:, None, None]).reshape(F1.n, -1), axis=1)
    # pass 1's (modules x cells) arrays are not needed any more: freed before pass 2 builds its own
    del F1, hits1
    if progress:
        progress("classify", 1, 3)
    # pass 2: final, suspects excluded from every reference
    F, hits = _stage(modules, stats, conditions, module_spec, cfg, cfg_ref, heat, ok, ok & ~suspect,
                     groups, pos, is_string, spread_all=spread_all, geometry=geometry,
                     string_patterns=string_patterns, spread_from=not_run, max_other_ratio=max_other_ratio)
    if progress:
        progress("classify", 2, 3)
    by = {h.defect: h for h in hits}
    open_own = by["open_module"].hit
    runs = F.extra["open_runs"]
    in_run = F.extra["in_run"]
    any_area = in_run | open_own | by["bypassed_substring"].hit | by["several_bypassed_substrings"].hit
    pid_runs = pattern_pid(F, cfg, groups, pos, is_string, any_area) if string_patterns else []

    g_cond = condition_column(conditions, "poa_global", n)
    w_cond = condition_column(conditions, "wind_speed", n)
    mod_id = modules["module_id"].astype(str).to_numpy() if "module_id" in modules else np.arange(n).astype(str)
    t_max = F.t_max
    rows = []
    precedence = list(cfg["precedence"])
    defect_of = np.full(n, None, dtype=object)
    conf_of = np.full(n, np.nan)

    # string-level anomalies first
    for run in runs:
        i0 = run[0]
        ref_o = F.extra["ref_other"][run]
        dts = t_med[run] - ref_o
        dt = float(np.median(dts))
        dtn = float(np.median(norm(dts, g_cond[run], w_cond[run])))
        # confidence from the run's combined evidence and how well its rise fits eta*G/U
        z_run = F.extra["d_other"][run] / max(F.extra["sig_other"], float(cfg["other_spread_floor_k"]))
        zc = float(np.nansum(z_run) / np.sqrt(len(run)))
        ratio = float(np.nanmedian(dts) / np.nanmedian(F.rise[run]))
        conf = float(confidence(quality(zc, float(cfg["open_string_run_z"])), fit_score(np.array(ratio))))
        rows.append(dict(module_index=i0, module_id=mod_id[i0], module_indices=list(run),
                         module_ids=[mod_id[i] for i in run], defect="open_string", other_defects=[],
                         region="modules", region_uv=[(0.0, 1.0, 0.0, 1.0)], delta_t_k=dt,
                         delta_t_norm_k=dtn, t_max_c=float(np.nanmax(t_max[run])), confidence=cf * conf))
        defect_of[run] = "open_string"
        conf_of[run] = cf * conf
    # potential-induced degradation: one anomaly per string, over the affected run of it
    # (module_id its first module, the one at the negative end), against modules outside the
    # string; a module of the run with a pattern that takes precedence over pid keeps its own
    # anomaly, patterns below pid are listed in the string's other_defects
    in_pid = np.zeros(n, bool)
    pid_rank = precedence.index("pid") if "pid" in precedence else len(precedence)
    for run in pid_runs:
        run = [i for i in run if not in_run[i]]
        if not run:
            continue
        in_pid[run] = True
        ref_o = F.extra["ref_other"][run]
        dts = t_med[run] - ref_o
        z_run = np.asarray(F.extra["pid_z"], dtype=float)[run]
        zc = float(np.nansum(z_run) / np.sqrt(len(run)))
        conf = cf * float(confidence(quality(zc, float(cfg["pid_run_z"]))))
        lower = []
        for i in run:
            for d in precedence[pid_rank + 1:]:
                if d in by and by[d].hit[i] and d not in lower:
                    lower.append(d)
        rows.append(dict(module_index=run[0], module_id=mod_id[run[0]], module_indices=list(run),
                         module_ids=[mod_id[i] for i in run], defect="pid", other_defects=lower,
                         region="modules", region_uv=[(0.0, 1.0, 0.0, 1.0)],
                         delta_t_k=float(np.nanmedian(dts)),
                         delta_t_norm_k=float(np.nanmedian(norm(dts, g_cond[run], w_cond[run]))),
                         t_max_c=float(np.nanmax(t_max[run])), confidence=conf))
        defect_of[run] = "pid"
        conf_of[run] = conf

    for i in range(n):
        if in_run[i] or not F.ok[i]:
            continue
        present = [d for d in precedence if d in by and by[d].hit[i]]
        if in_pid[i]:
            # the string's pid anomaly covers the module unless a pattern above pid is there
            present = present[:1] if present and precedence.index(present[0]) < pid_rank else []
        if not present:
            continue
        d = present[0]
        h = by[d]
        temp = float(h.temp_c[i])
        dt = temp - F.ref[i]
        conf = cf * float(h.confidence[i])
        rows.append(dict(module_index=i, module_id=mod_id[i], module_indices=[i], module_ids=[mod_id[i]],
                         defect=d, other_defects=present[1:] + (["pid"] if in_pid[i] else []),
                         region=h.region.get(i, "module"),
                         region_uv=h.boxes.get(i, [(0.0, 1.0, 0.0, 1.0)]), delta_t_k=dt,
                         delta_t_norm_k=float(norm(dt, g_cond[i], w_cond[i])), t_max_c=float(t_max[i]),
                         confidence=conf))
        defect_of[i] = d
        conf_of[i] = conf

    anomalies = pd.DataFrame(rows, columns=[c for c in ANOMALY_COLUMNS if c not in ("severity", "iec_class")])
    anomalies = assign_severity(anomalies, cfg_sev)
    anomalies = anomalies[ANOMALY_COLUMNS].reset_index(drop=True)
    if len(anomalies):
        anomalies["module_index"] = anomalies["module_index"].astype(int)

    th = module_thermal(t_med, F.ref, conditions, norm)
    module_table = pd.DataFrame({
        "reference_c": th.reference_c,
        "delta_t_k": th.delta_t_k,
        "delta_t_norm_k": th.delta_t_norm_k,
        "defect": defect_of,
        "classified": F.ok,
        "confidence": conf_of,
    }, index=modules.index)
    if progress:
        progress("classify", 3, 3)
    logger.info("classified %d modules: %d anomalies", int(F.ok.sum()), len(anomalies))
    evidence = _evidence(F, groups)
    evidence.update(_row_clusters(modules, defect_of, F.ok, cfg))
    evidence.update(_row_edges(modules, F, cfg))
    evidence.update(_cold_runs(modules, th.delta_t_k, F, cfg))
    evidence.update(_unexplained_pid(F, groups, pos, is_string, defect_of, mod_id, cfg, pid_runs))
    return Diagnosis(anomalies, module_table, evidence=evidence)


def _row_clusters(modules: pd.DataFrame, defect: np.ndarray, ok: np.ndarray,
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


def _cold_runs(modules: pd.DataFrame, delta_t_k: np.ndarray, F: Features, cfg: Mapping[str, Any]) -> dict[str, Any]:
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


def _row_edges(modules: pd.DataFrame, F: Features, cfg: Mapping[str, Any]) -> dict[str, Any]:
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


def _unexplained_pid(F: Features, groups: np.ndarray, pos: np.ndarray, is_string: bool,
                     defect: np.ndarray, mod_id: np.ndarray, cfg: Mapping[str, Any],
                     pid_runs: list[list[int]] | None = None) -> dict[str, Any]:
    """The strongest PID pattern that no finding explains.

    Among classified modules without a finding that could start a PID string (the module at a
    string's negative end; any module of a table row when strings are unknown) and run warmer
    than modules outside their string by at least ``[classify] pid_warm_min_z`` robust
    spreads (PID takes power away, so its modules run warm), the highest edge-ring contrast
    ``pid_z`` [robust SD] (``pid_unexplained_z``, None when PID was not looked for) and its
    module (``pid_unexplained_module``). A pattern this strong that no PID string took in is
    a string-level fault the patterns could not place.

    With strings known, also the lesser of the contrast against modules of other rows (``pid_z``)
    and against the module's own table row (``pid_z_row``), combined over the first modules of a
    string in no finding, warm or not (``pid_pattern_unexplained_z`` [robust SD],
    ``pid_pattern_unexplained_module`` at the string's negative end, over
    ``pid_pattern_unexplained_modules``; :func:`pvscan.diagnose.patterns.pid.unexplained_string_pattern`):
    a pattern both references see is the modules' own, not a row's artefact, whatever their
    warmth against a reference a small plant or a shadow may bias.

    And the combined evidence of the edge-ring contrast with the excess over modules outside the
    string (the evidence a run is extended by,
    :func:`pvscan.diagnose.patterns.pid.extension_evidence`) over modules in no finding past the end of each found
    PID run, to its string's end (``pid_tail_unexplained_z`` [robust SD], ``pid_tail_unexplained_module``
    where it starts, over ``pid_tail_unexplained_modules``;
    :func:`pvscan.diagnose.patterns.pid.unexplained_tail_evidence`): a PID string found only in part.
    """
    out: dict[str, Any] = {"pid_unexplained_z": None, "pid_unexplained_module": None}
    z = F.extra.get("pid_z")
    if z is None:
        return out
    z = np.asarray(z, dtype=float)
    z_o = excess_z(F, cfg)
    free = F.ok & np.array([d is None for d in defect], bool) & (groups >= 0)
    if is_string:
        first = np.zeros(F.n, bool)
        for g in np.unique(groups[groups >= 0]):
            idx = np.flatnonzero(groups == g)
            first[idx[np.argmin(pos[idx])]] = True
        free &= first
    with np.errstate(invalid="ignore"):
        cand = free & np.isfinite(z) & (z_o >= float(cfg["pid_unexplained_min_excess_z"]))
    out["pid_unexplained_z"] = 0.0
    if cand.any():
        i = int(np.argmax(np.where(cand, z, -np.inf)))
        out.update(pid_unexplained_z=max(float(z[i]), 0.0), pid_unexplained_module=str(mod_id[i]))
    # with strings known: the pattern against both references, modules of other rows (z) and
    # the module's own table row (pid_z_row), the lesser of the two, warm or not, over the first
    # modules of a string in no finding (pvscan.diagnose.patterns.pid.unexplained_string_pattern)
    z_row = F.extra.get("pid_z_row")
    if is_string and z_row is not None:
        v, at, m = unexplained_string_pattern(z, np.asarray(z_row, dtype=float), groups, pos,
                                              F.ok & np.array([d is None for d in defect], bool),
                                              float(cfg["pid_max_position"]))
        out.update(pid_pattern_unexplained_z=v, pid_pattern_unexplained_module=None if at is None else str(mod_id[at]),
                   pid_pattern_unexplained_modules=m)
    # PID going on past a found run, below the bars of a run
    z_ext = extension_evidence(z, z_o, cfg)
    in_none = F.ok & np.array([d is None for d in defect], bool)
    v, at, m = unexplained_tail_evidence(z_ext, groups, pos, is_string, in_none, [list(r) for r in (pid_runs or [])])
    out.update(pid_tail_unexplained_z=v, pid_tail_unexplained_module=None if at is None else str(mod_id[at]),
               pid_tail_unexplained_modules=m)
    return out


def _evidence(F: Features, groups: np.ndarray) -> dict[str, Any]:
    """What the final pass measured about the flight as a whole, for the validity checks of
    :mod:`pvscan.measure.validity`: the module-to-module spread of healthy modules
    (``module_spread_k`` [K]), the spread of their excess over modules outside their own
    string or table row as measured, before any cap (``other_spread_k`` [K]), the median
    open-module rise ``eta * G / U`` (``open_rise_k`` [K]), and how many strings (or table
    rows standing in for them) hold classified modules (``groups``)."""
    rise = F.rise[F.ok] if F.ok.any() else F.rise
    g = groups[F.ok & (groups >= 0)]
    return {"module_spread_k": float(F.sig_mod),
            "other_spread_k": float(F.extra.get("sig_other_measured", float("nan"))),
            "open_rise_k": float(np.nanmedian(rise)) if np.isfinite(rise).any() else float("nan"),
            "groups": int(len(np.unique(g))),
            "strings_known": bool(F.extra.get("is_string", False))}
