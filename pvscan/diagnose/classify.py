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
from pvscan.diagnose.row_evidence import cold_runs, row_clusters, row_edges
from pvscan.diagnose.severity import assign_severity
from pvscan.diagnose.thermal import Normalisation, condition_column, local_reference, module_thermal
from pvscan.io.settings import section
from pvscan.physics.heat import Faiman
from pvscan.robust import iqr, scaled_mad

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
    evidence.update(row_clusters(modules, defect_of, F.ok, cfg))
    evidence.update(row_edges(modules, F, cfg))
    evidence.update(cold_runs(modules, th.delta_t_k, F, cfg))
    evidence.update(_unexplained_pid(F, groups, pos, is_string, defect_of, mod_id, cfg, pid_runs))
    return Diagnosis(anomalies, module_table, evidence=evidence)


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
