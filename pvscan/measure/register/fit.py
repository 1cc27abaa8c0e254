"""Register the layout: propose with the block correlation, judge on module evidence.

:func:`register_layout` is what the pipeline calls:

1. the block correlation (:func:`pvscan.measure.register.estimate.estimate_shift`)
   proposes a placement: its shift field (shift, rotation and scale across the blocks),
   or its measured shift even when it judged itself weak;
2. the proposal is refined by a pattern search on the module evidence
   (:mod:`pvscan.measure.register.evidence`: the spread of the pixels inside the
   footprints), translation, rotation and scale, first with footprints shrunk to their
   core (a wide basin) and then nearly whole (a sharp one);
3. the layout as drawn and the refined proposal are judged on the same sample of modules:
   the proposal is used only when its footprints sit on modules (both probe ratios at most
   ``evidence_max_ratio``) and its evidence beats the drawn layout's by
   ``evidence_gate``; otherwise the layout is used as drawn when *it* sits on modules;
   otherwise the registration has failed, and says so.

Nothing is moved on a layout that is right: the drawn placement is the default, and a
proposal has to show that it puts footprints on glass better before it is used. A placement
the table ends do not tell from one a module pitch away is flagged (``_resolve_pitch``).
"""
from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Mapping
from dataclasses import replace
from typing import TYPE_CHECKING, Any

import numpy as np

from pvscan._typing import ProgressFn
from pvscan.errors import RegistrationWarning
from pvscan.io.layout.frames import FRAME_COLUMNS
from pvscan.measure._memory import release_freed_memory
from pvscan.measure.register._blocks import _settings
from pvscan.measure.register._chunks import shared_chunks
from pvscan.measure.register._pitch import (
    _across,
    _distinct,
    _judge,
    _pitch_m,
    _pitches,
    _placement_of,
    _resolve_pitch,
    _row_pitch,
    _sample_at,
    _screen_turned,
    _turned,
)
from pvscan.measure.register._place import (
    _centre,
    _no_move,
    _use_placement,
    apply_placement,
    placement_of,
)
from pvscan.measure.register._records import Registration, _moved_message, _num
from pvscan.measure.register._turn import measure_rotation
from pvscan.measure.register.estimate import estimate_shift
from pvscan.measure.register.evidence import Placement, _compose, _inverse
from pvscan.measure.register.local import check_reach, refine_rows, refine_tables, take_modules
from pvscan.measure.register.search import refine_placement

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

logger = logging.getLogger(__name__)

__all__ = ["register_layout", "apply_placement", "placement_of", "align_layout"]


def register_layout(orthos: Any, modules: gpd.GeoDataFrame, settings: Mapping[str, Any] | None = None, *,
                    sun: tuple[float, ...] | None = None,
                    expected_apparent_c: float | None = None, progress: ProgressFn | None = None,
                    forced_shift: tuple[float, float] | None = None) -> Registration:
    """Find where the layout sits on the ortho, and whether it can be measured there.

    Parameters
    ----------
    orthos : OrthoSet
    modules : geopandas.GeoDataFrame
        Module footprints with their frames, in the ortho CRS [m].
    settings : mapping, optional
        The ``[register]`` section (or a pipeline).
    sun : (float, float, float), optional
        Unit vector toward the sun on the map (east, north) and its elevation [deg]
        (:func:`pvscan.measure.register.evidence.sun_vector`): probes onto a table's shadowed
        side count less in the quality test.
    expected_apparent_c : float, optional
        Passed to the block correlation (its candidate test).
    forced_shift : (float, float), optional
        A known offset to use (east, north) [m]; it is judged and recorded, never replaced.

    Returns
    -------
    Registration
        ``placement`` (the similarity used, in ``to_dict()['placement']``), ``evidence``
        (drawn layout and proposal: evidence [K], probe ratios, ok), ``status``
        (``"ok"`` or ``"failed"``) and a ``message``; ``applied`` / ``shift_m`` /
        ``model`` as for the block fit, so :func:`apply_shift` still works.
    """
    cfg = _settings(settings)
    if not cfg["enabled"]:
        return Registration(message="registration disabled ([register] enabled = false)", status="not_run")
    with shared_chunks(orthos) as shared:  # every module sample decodes a part of the ortho once
        reg = _register(shared, modules, cfg, sun, expected_apparent_c, progress, forced_shift)
    logger.info("register: %s", reg.message)
    # the block passes' and samples' arrays, freed, would stay resident in the C heap
    release_freed_memory()
    return reg


def _register(orthos: Any, modules: gpd.GeoDataFrame, cfg: Mapping[str, Any], sun: tuple[float, ...] | None,
              expected_apparent_c: float | None, progress: Any, forced_shift: Any) -> Registration:
    """:func:`register_layout` on settings already read."""
    centre = _centre(modules)
    ident = Placement(cx=centre[0], cy=centre[1])
    bounds = modules.total_bounds
    proposals: list[Placement] = []
    correlation: tuple[Placement | None, float] = (None, 0.0)
    if forced_shift is not None:
        reg = Registration(notes=[f"shift given by the user: ({forced_shift[0]:+.3f}, {forced_shift[1]:+.3f}) m"])
        proposals.append(ident.moved(tx=float(forced_shift[0]), ty=float(forced_shift[1])))
        refine = False
    else:
        extent = max(float(bounds[2] - bounds[0]), float(bounds[3] - bounds[1]))
        # besides the configured blocks, at least min_blocks_across blocks across the site, so
        # that rotation and scale are measured on a small site too (one block: a shift only)
        small = min(float(cfg["block_m"]), max(float(cfg["min_block_m"]), extent / float(cfg["min_blocks_across"])))
        fits: list[Registration] = []
        cache: dict[Any, Any] = {}  # equal windows of the two block sizes are analysed once
        for block in dict.fromkeys([float(cfg["block_m"]), small]):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RegistrationWarning)
                r = estimate_shift(orthos, modules, {**cfg, "block_m": block}, progress=progress,
                                   expected_apparent_c=expected_apparent_c, block_cache=cache)
            fits.append(r)
            p = placement_of(r, centre)
            if p is not None:
                proposals.append(p)
        cache.clear()  # the blocks' arrays and module samples are not needed beyond the passes
        reg = fits[0]
        refine = True
        # the block correlation's own placement (the whole table outlines, ends included) and
        # its confidence: a vote on the one-pitch ambiguity independent of the module evidence
        correlation = (placement_of(reg, centre), float(reg.confidence))
    s_id = _sample_at(orthos, modules, None, cfg)
    if len(s_id) == 0:
        reg.status = "failed"
        reg.message = "no layout module could be sampled on the ortho"
        return _no_move(reg)
    q_id = _judge(s_id, ident, cfg, sun, expected_apparent_c)
    reg.evidence = {"drawn": q_id, "proposals": []}
    lim = float(cfg["evidence_max_ratio"])
    gate = float(cfg["evidence_gate"])
    radius = float(cfg["evidence_local_radius_m"])
    far = float(cfg["evidence_far_gate"])
    chosen, q_c = None, None
    rescue = False

    def consider(cand: Placement) -> None:
        nonlocal chosen, q_c
        if refine:
            pl, s_c, inner = _fit_proposal(orthos, modules, cand, cfg)
        else:
            s_c, inner = _sample_at(orthos, modules, cand, cfg), ident
            pl = cand
        q = _judge(s_c, inner, cfg, sun, expected_apparent_c)
        move = pl.displacement_max(bounds)
        reg.evidence["proposals"].append({**q, **pl.to_dict(), "largest_move_m": round(move, 4)})
        usable = q["ok"] and (forced_shift is not None or (
            q["evidence"] < (1.0 - gate) * q_id["evidence"]
            # a layout that already sits on the modules is refined within a small radius; a
            # larger move of a periodic field (one module pitch: every footprint on the next
            # module) must cut the evidence far more, as the table ends do when the layout is off
            and (not q_id["ok"] or move <= radius or q["evidence"] <= far * q_id["evidence"])))
        if usable and move >= float(cfg["min_shift_m"]) and (q_c is None or q["evidence"] < q_c["evidence"]):
            chosen, q_c = pl, q

    tol = float(cfg["distinct_tol_m"])
    fitted = _distinct(proposals, bounds, tol)
    for cand in fitted:
        consider(cand)
    if refine and chosen is None and not q_id["ok"]:
        # rows are periodic across too: a proposal half a row pitch off puts every footprint
        # on the ground between rows (it fails the glass test); the fit is tried again from
        # half and one row pitch either side of each proposal
        along = _pitches(modules)
        rp = _row_pitch(modules, along[0] if along else None)
        steps = [k * along[0] for k in (1.0, -1.0)] if along else []
        if rp is not None:
            steps += [k * rp for k in (0.5, -0.5)]
        first = list(reg.evidence["proposals"])
        lim_m = float(cfg["max_shift_m"])
        for q0 in first:
            p0 = _placement_of(q0, centre)
            for v in steps:
                alt = p0.moved(tx=p0.tx + float(v[0]), ty=p0.ty + float(v[1]))
                if math.hypot(alt.tx, alt.ty) <= lim_m:
                    consider(alt)
        # a layout turned on a long site: the block correlation aliases and its rotation is
        # wrong; the turn of the rows, measured from the ortho alone, and the blocks correlated
        # again on the layout so turned give a start of the right turn and shift
        if chosen is None:
            for alt in _turned_proposals(orthos, modules, reg, cfg, centre, expected_apparent_c):
                consider(alt)
        # a proposal's rotation off by a degree puts the far
        # modules beyond the fit's reach; tried again from each proposal turned by steps, the
        # nearest turns first, until one puts the footprints on glass
        # (each fit costs seconds on a large site: the turned starts are screened cheaply first
        # and at most retry_turn_max_fits of them, the most promising first, are fitted)
        turned = (_turned(modules, _distinct([_placement_of(q0, centre) for q0 in first], bounds, tol), cfg)
                  if chosen is None else [])
        red = _reduce_for(orthos, cfg)

        def fit_screened(starts: list[Placement], most: int) -> int:
            """Fit the most promising ``most`` of ``starts`` (one cheap look each), best first,
            until one is chosen; returns how many were fitted."""
            n = 0
            for alt in _screen_turned(starts, cfg, lambda p: _sample_at(orthos, modules, p, cfg, reduce=red))[:most]:
                consider(alt)
                n += 1
                if chosen is not None:
                    break
            return n

        fit_screened(turned, int(cfg["retry_turn_max_fits"]))
        # a raised table's shadow as wide as the table: the blocks matched the table's outline
        # to its shadow's, whole module pitches across the rows away from the sun; every
        # proposal so far moved back toward the sun is looked at cheaply and at most
        # retry_across_max_fits of them fitted, the best first
        # (starts closer than the fit's reach, retry_turn_fraction of a pitch, are one)
        tried = [_placement_of(q0, centre) for q0 in reg.evidence["proposals"]]
        reach = float(cfg["retry_turn_fraction"]) * _pitch_m(modules, "across")
        across = (_distinct(_across(modules, _distinct(tried, bounds, tol), lim_m, sun), bounds,
                            reach if math.isfinite(reach) else tol) if chosen is None else [])
        fitted_across = fit_screened(across, int(cfg["retry_across_max_fits"]))
        if across:
            reg.evidence["across_starts"] = {"starts": len(across), "fitted": fitted_across,
                                             "placed": chosen is not None}
    if forced_shift is not None:
        # a known offset is used as given; the evidence only says whether it fits
        q_c = reg.evidence["proposals"][0]
        chosen = ident.moved(tx=float(forced_shift[0]), ty=float(forced_shift[1]))
        _use_placement(reg, chosen, residuals=False)
        reg.status = "ok" if q_c["ok"] else "failed"
        reg.evidence["used"] = "given"
        reg.message = (f"layout moved by the given shift ({chosen.tx:+.3f}, {chosen.ty:+.3f}) m: module evidence "
                       f"{q_id['evidence']:.3f} -> {q_c['evidence']:.3f} (probe ratios {q_c['ratio_u']:.2f}, "
                       f"{q_c['ratio_v']:.2f}; at most {lim:g}"
                       + ("" if q_c["ok"] else "; the footprints do not sit on glass there") + ")")
    elif chosen is not None and q_c is not None:
        _use_placement(reg, chosen)
        reg.status = "ok"
        reg.evidence["used"] = "proposal"
        reg.message = _moved_message(chosen, "", q_id, q_c, lim)
    elif q_id["ok"]:
        reg.placement = ident
        reg.status = "ok"
        reg.evidence["used"] = "drawn"
        why = ("no proposal" if not proposals else
               "no proposal put footprints on glass better than the layout as drawn")
        reg.message = (f"layout used as drawn ({why}): module evidence {q_id['evidence']:.3f}, probe ratios "
                       f"{q_id['ratio_u']:.2f}, {q_id['ratio_v']:.2f} (limit {lim:g})")
        _no_move(reg)
    elif refine and (rescued := _rescue_locally(orthos, modules, reg, cfg, ident, sun, expected_apparent_c)):
        chosen, q_c = rescued
        rescue = True
        _use_placement(reg, chosen)
        reg.status = "ok"
        reg.evidence["used"] = "proposal"
        reg.message = _moved_message(chosen, f", then table by table ({reg.local.message})", q_id, q_c, lim)
    else:
        reg.placement = ident
        reg.status = "failed"
        reg.evidence["used"] = "none"
        qs = [q_id] + list(reg.evidence["proposals"])
        best = min(qs, key=lambda q: max(_num(q.get("ratio_u")), _num(q.get("ratio_v"))))
        reg.message = ("the layout could not be placed on the modules of the ortho: footprints do not sit on glass "
                       f"(best probe ratios {_num(best.get('ratio_u')):.2f}, {_num(best.get('ratio_v')):.2f}; at most "
                       f"{lim:g} needed)")
        off = (reg.evidence.get("local_rescue") or {}).get("tables_off_glass")
        if off:
            reg.message += (f"; refined table by table, {len(off)} table(s) still off glass ("
                            f"{reg.evidence['local_rescue']['off_glass_share']:.0%} of the sampled modules: "
                            f"{', '.join(off[:5])}{' ...' if len(off) > 5 else ''})")
        _no_move(reg)
    if q_c is not None:
        reg.evidence["chosen"] = q_c
    if reg.status == "ok" and forced_shift is None:
        _resolve_pitch(orthos, modules, reg, cfg, ident, sun, expected_apparent_c, correlation)
    if rescue and q_c is not None and reg.status != "ok":
        # put on glass only table by table, and one module pitch away fits almost as well:
        # too weak to measure on
        reg.placement = ident
        reg.status = "failed"
        reg.evidence["used"] = "none"
        reg.message = ("the layout could not be placed on the modules of the ortho: refined table by table its "
                       f"footprints sit on glass (probe ratios {q_c['ratio_u']:.2f}, {q_c['ratio_v']:.2f}), but a "
                       "placement one module pitch away fits almost as well")
        _no_move(reg)
    if reg.status in ("ok", "ambiguous") and forced_shift is None and cfg["local_enabled"] and reg.local is None:
        _refine_locally(orthos, modules, reg, cfg, ident)
    if reg.status == "ok" and forced_shift is None:
        check_reach(reg, cfg)
    return reg


def _turned_proposals(orthos: Any, modules: gpd.GeoDataFrame, reg: Registration, cfg: Mapping[str, Any],
                      centre: tuple[float, float], expected_c: float | None) -> list[Placement]:
    """Starts at the turn of the ortho's rows (:func:`._turn.measure_rotation`): the block fit
    of the layout turned by it (its shift and any further turn and scale composed after the
    turn), then the layout as drawn turned by it; none when the turn cannot be measured.
    ``reg.evidence["rotation_probe"]`` records the measurement and the starts made."""
    if not cfg["rotation_probe"]:
        return []
    got = measure_rotation(orthos, modules, cfg)
    if got is None:
        return []
    th = float(got["rotation_deg"])
    rec: dict[str, Any] = {**got, "starts": 0}
    reg.evidence["rotation_probe"] = rec
    turn = Placement(cx=centre[0], cy=centre[1], theta_deg=th)
    out = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RegistrationWarning)
        r = estimate_shift(orthos, apply_placement(modules, turn), cfg, expected_apparent_c=expected_c)
    p = placement_of(r, centre)
    if p is not None:
        out.append(_compose(turn, p))
    out.append(turn)
    rec["starts"] = len(out)
    return out


def _rescue_locally(orthos: Any, modules: gpd.GeoDataFrame, reg: Registration, cfg: Mapping[str, Any], ident: Placement,
                    sun: tuple[float, ...] | None,
                    expected_c: float | None) -> tuple[Placement, dict[str, Any]] | None:
    """The proposal nearest to sitting on glass, refined table by table (:mod:`.local`) and
    judged again by the same glass test.

    A global similarity cannot follow the tables one by one: where the ortho's local
    distortion is a few centimetres, the footprints of a right global fit straddle the
    module edges enough to fail the probe ratios. Returns the placement with its table
    corrections and its quality when it passes, else None (``reg.local`` keeps the attempt)."""
    if not cfg["local_enabled"]:
        return None
    props = [q for q in (reg.evidence or {}).get("proposals", []) if "shift_m" in q]
    if not props:
        return None
    best = min(props, key=lambda q: max(_num(q.get("ratio_u")), _num(q.get("ratio_v"))))
    if not math.isfinite(max(_num(best.get("ratio_u")), _num(best.get("ratio_v")))):
        return None
    p0 = Placement(float(best["shift_m"][0]), float(best["shift_m"][1]), float(best["rotation_deg"]),
                   float(best["scale"]), ident.cx, ident.cy)
    lf = refine_tables(orthos, apply_placement(modules, p0), cfg)
    reg.local = lf
    if not lf.applied:
        return None
    pl = Placement(p0.tx, p0.ty, p0.theta_deg, p0.scale, p0.cx, p0.cy,
                   tables=tuple((str(k), float(v[0]), float(v[1])) for k, v in lf.shifts.items()))
    sample = _sample_at(orthos, modules, pl, cfg)
    q = _judge(sample, ident, cfg, sun, expected_c)
    rec = reg.evidence["local_rescue"] = {**q, "tables_refined": int(lf.summary().get("tables_refined", 0))}
    if not q["ok"]:
        return None
    # the tables the refinement could not move onto glass stay where the global fit, off
    # glass, put them: the site's mean can pass with a third of the tables off their modules
    off, share = _tables_off_glass(sample, ident, cfg, sun, expected_c)
    rec.update(tables_off_glass=off, off_glass_share=round(share, 4))
    return (pl, q) if share <= float(cfg["rescue_max_off_glass_share"]) else None


def _tables_off_glass(sample: Any, placement: Placement, cfg: Mapping[str, Any], sun: tuple[float, ...] | None,
                      expected_c: float | None) -> tuple[list[str], float]:
    """The tables whose own sampled modules (at least ``rescue_table_min_modules``) fail the
    glass test of :func:`_judge`, and the share of the sampled modules they hold [-]."""
    tables = np.asarray(sample.table).astype(str)
    if len(tables) == 0:
        return [], 0.0
    off, n_off = [], 0
    for t in np.unique(tables):
        sel = np.flatnonzero(tables == t)
        if len(sel) < int(cfg["rescue_table_min_modules"]):
            continue
        if not _judge(take_modules(sample, sel), placement, cfg, sun, expected_c)["ok"]:
            off.append(str(t))
            n_off += len(sel)
    return off, n_off / len(tables)


def _refine_locally(orthos: Any, modules: gpd.GeoDataFrame, reg: Registration, cfg: Mapping[str, Any],
                    ident: Placement) -> None:
    """Per-table corrections after the global placement (:mod:`.local`), kept in
    ``reg.placement.tables`` when the module evidence prefers them."""
    base = reg.placement if (reg.applied and reg.placement is not None) else ident
    lf = refine_tables(orthos, apply_placement(modules, base), cfg)
    reg.local = lf
    if lf.applied:
        base = Placement(base.tx, base.ty, base.theta_deg, base.scale, base.cx, base.cy,
                         tables=tuple((str(k), float(v[0]), float(v[1])) for k, v in lf.shifts.items()))
        reg.message += f"; {lf.message}"
    if cfg["local_rows_enabled"]:
        # then each row of a table, from where its table now sits
        lr = refine_rows(orthos, apply_placement(modules, base), cfg)
        reg.local_rows = lr
        if lr.applied:
            base = replace(base, rows=tuple((t["table_id"], t["table_row"], t["dx_m"], t["dy_m"])
                                            for t in lr.table_records()))
            reg.message += f"; {lr.message}"
    if not (lf.applied or (reg.local_rows is not None and reg.local_rows.applied)):
        return
    reg.placement = base
    if not reg.applied:
        # the global placement is the layout as drawn; only tables (rows) move
        reg.applied = True
        reg.model = reg.placement.shift_model()
        reg.follow_drift = True
        reg.shift_m = (0.0, 0.0)


def _reduce_for(orthos: Any, cfg: Mapping[str, Any]) -> int:
    """Integer pixel reduction giving about ``evidence_coarse_gsd_m`` (at least 1)."""
    gsd = abs(float(next(iter(orthos.tiles)).transform.a))
    return max(1, int(round(float(cfg["evidence_coarse_gsd_m"]) / gsd)))


def _fit_at(orthos: Any, modules: gpd.GeoDataFrame, start: Placement, cfg: Mapping[str, Any], *, insets: Any,
            rotate: bool, scale: bool, reduce: int,
            step_m: float | None = None) -> tuple[Placement, Any, Placement, float]:
    """Refine ``start`` on a sample read around it; read again around the result while the
    refinement moved the footprints more than half the margin the sample holds.

    Returns the placement, the sample of its last read, the placement relative to that
    sample and its evidence at the last inset [-]."""
    centre = (start.cx, start.cy)
    bounds = modules.total_bounds
    pl, sample, inner, e = start, None, Placement(cx=centre[0], cy=centre[1]), float("inf")
    half = 0.5 * float(cfg["evidence_margin_m"])
    for _ in range(3):
        sample = _sample_at(orthos, modules, pl, cfg, reduce=reduce)
        inner = Placement(cx=centre[0], cy=centre[1])
        for inset in insets:
            sub = {**cfg, "evidence_inset": float(inset)}
            if step_m is not None:
                sub["evidence_step_m"] = step_m
            inner, e = refine_placement(sample, inner, sub, rotate=rotate, scale=scale)
        if inner.displacement_max(bounds) <= half:
            break
        pl = _compose(pl, inner)
    return _compose(pl, inner), sample, inner, e


def _fit_proposal(orthos: Any, modules: gpd.GeoDataFrame, cand: Placement,
                  cfg: Mapping[str, Any]) -> tuple[Placement, Any, Placement]:
    """Coarse-to-fine fit of one proposal: the coarse insets on a decimated sample, the
    one-pitch alternatives along and across the rows compared there, then the last inset at
    full resolution. Returns the placement, its full-resolution sample and the placement
    relative to that sample."""
    insets = [float(v) for v in cfg["evidence_insets"]]
    red = _reduce_for(orthos, cfg)
    rot, sca = bool(cfg["fit_rotation"]), bool(cfg["fit_scale"])
    pl, _, _, e = _fit_at(orthos, modules, cand, cfg, insets=insets[:-1] or insets, rotate=rot, scale=sca,
                          reduce=red)
    # rows of modules are periodic: one module pitch along or across a row fits almost as
    # well; only table ends and array edges tell, each alternative is read where it puts the
    # footprints and refined by translation
    step = float(cfg["evidence_step_m"]) / 2.0
    last = [insets[-2] if len(insets) > 1 else insets[-1]]
    _, _, _, e = _fit_at(orthos, modules, pl, cfg, insets=last, rotate=False, scale=False, reduce=red, step_m=step)
    for v in _pitches(modules):
        for sgn in (1.0, -1.0):
            alt = pl.moved(tx=pl.tx + sgn * float(v[0]), ty=pl.ty + sgn * float(v[1]))
            pa, _, _, ea = _fit_at(orthos, modules, alt, cfg, insets=last, rotate=False, scale=False, reduce=red,
                                   step_m=step)
            if math.isfinite(ea) and ea < e:
                pl, e = pa, ea
    pl, sample, inner, _ = _fit_at(orthos, modules, pl, cfg, insets=insets[-1:], rotate=rot, scale=sca, reduce=1,
                                   step_m=step)
    # the outline contrast pulls a footprint toward the strongest edge beside it (a shadow,
    # a table edge) by centimetres; the plain spread inside a nearly whole footprint does not
    base = _compose(pl, _inverse(inner))  # where the sample was read
    fine = {**cfg, "evidence_band_m": None, "evidence_inset": float(cfg["evidence_fine_inset"]),
            "evidence_step_m": step / 2.0}
    inner, _ = refine_placement(sample, inner, fine, rotate=rot, scale=sca)
    return _compose(base, inner), sample, inner


def align_layout(flight: Any, settings: Mapping[str, Any] | None = None, out_path: Any = None, *,
                 overwrite: bool = False, progress: ProgressFn | None = None) -> tuple[Registration, gpd.GeoDataFrame]:
    """Place a flight's layout on its ortho (:func:`register_layout`) and optionally write it.

    Parameters
    ----------
    flight : Flight
    settings : Pipeline or mapping, optional
    out_path : path-like, optional
        ``.gpkg`` (layer ``modules``, the ortho's CRS) or ``.geojson`` (RFC 7946, lon/lat):
        the module footprints where the registration placed them, with the layout's
        properties (the internal module-frame columns left out). Written atomically.
    overwrite : bool

    Returns
    -------
    (Registration, geopandas.GeoDataFrame)
        The registration and the placed modules (ortho CRS).

    Raises
    ------
    OutputError
        Unknown suffix, existing file without ``overwrite``, missing folder, write failure.
        Nothing is written when the registration failed (``reg.status == "failed"``).
    """
    from pathlib import Path

    from pvscan.errors import OutputError
    from pvscan.io.layout import read_layout
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline
    from pvscan.measure.register.evidence import sun_vector
    from pvscan.measure.register.physics import expected_module_apparent_c, site_lonlat

    suffix = Path(out_path).suffix.lower() if out_path is not None else ""
    if out_path is not None:
        out_path = Path(out_path)
        if suffix not in (".gpkg", ".geojson"):
            raise OutputError(f"{out_path}: the corrected layout is written as GeoPackage (.gpkg) or GeoJSON "
                              "(.geojson)")
        if out_path.exists() and not overwrite:
            raise OutputError(f"{out_path}: exists (use --overwrite to replace it)")
        if not out_path.parent.is_dir():
            raise OutputError(f"{out_path}: folder {out_path.parent} does not exist")
    pipeline = settings if (settings is not None and "register" in settings) else load_pipeline()
    cfg = _settings(settings)
    with open_orthos(flight.flight.orthos, flight.ortho) as orthos:
        modules = read_layout(flight, orthos.crs)
        expected = expected_module_apparent_c(flight, pipeline, strict=False)
        lon, lat = site_lonlat(modules)
        sun = sun_vector(lon, lat, flight.flight.start + (flight.flight.end - flight.flight.start) / 2)
        reg = register_layout(orthos, modules, cfg, sun=sun, expected_apparent_c=expected, progress=progress)
    moved = apply_placement(modules, reg.placement if reg.applied else None)
    if out_path is not None and reg.status != "failed":
        from pvscan.io.outputs import atomic_path

        out = moved.drop(columns=[k for k in FRAME_COLUMNS if k in moved.columns]).reset_index(drop=True)
        if suffix == ".gpkg":
            with atomic_path(out_path, suffix=".tmp.gpkg") as tmp:
                out.to_file(tmp, layer="modules", driver="GPKG", engine="pyogrio")
        else:
            with atomic_path(out_path, suffix=".tmp.geojson") as tmp:
                out.to_crs(4326).to_file(tmp, driver="GeoJSON", engine="pyogrio", RFC7946="YES", COORDINATE_PRECISION=7)
    return reg, moved
