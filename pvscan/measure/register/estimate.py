"""The block fit: :func:`estimate_shift`, :func:`apply_shift`, :func:`align_flight`."""
from __future__ import annotations

import dataclasses
import logging
import math
import warnings
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING, Any

import numpy as np
from rasterio.windows import Window

from pvscan._typing import ProgressFn
from pvscan.errors import RegistrationError, RegistrationWarning
from pvscan.measure.register._blocks import (
    _MAX_CANDIDATES,
    _block_windows,
    _BlockData,
    _fit_similarity,
    _prepare_block,
    _settings,
    _spread_enough,
    _tile_attr,
    _tile_gsd,
    _weighted_median,
)
from pvscan.measure.register._records import BlockShift, Registration
from pvscan.measure.register.physics import _plausibility, expected_module_apparent_c

if TYPE_CHECKING:  # pragma: no cover
    import geopandas

logger = logging.getLogger(__name__)


def estimate_shift(orthos: Any, modules: geopandas.GeoDataFrame, settings: Mapping | None = None, *,
                   progress: ProgressFn | None = None, expected_apparent_c: float | None = None,
                   flight: Any = None, block_cache: dict[Any, Any] | None = None) -> Registration:
    """Measure the layout-to-ortho offset from the image.

    Parameters
    ----------
    orthos : OrthoSet
        ``.tiles`` (each with ``transform``, ``crs``, ``width``, ``height``, ``bounds``,
        ``gsd_m``) and ``.read(tile_index, window) -> float32`` apparent temperature
        [degC] with NaN for nodata. Only windowed reads are made.
    modules : geopandas.GeoDataFrame
        Module footprints in the ortho CRS [m].
    settings : mapping, optional
        The ``[register]`` section (or a whole pipeline); missing keys take the defaults.
    progress : callable, optional
        ``progress("register", done, total)`` after each block.
    expected_apparent_c : float, optional
        Apparent temperature the camera export should report for sunlit module glass at
        the flight's conditions [degC] (:func:`expected_module_apparent_c`). When given
        (and ``plausibility`` is on), candidate shifts that the correlation scores close
        to the best are told apart by the median apparent temperature they put inside a
        sample of module footprints: a fit that lays the footprints on an equally wide,
        cooler shadow strip is replaced by the candidate whose modules look like modules.
    flight : Flight, optional
        Used only when ``expected_apparent_c`` is not given, to compute it with
        :func:`expected_module_apparent_c` and the default pipeline's ``[conditions]``,
        ``[reference]`` and ``[radiometry]`` sections (skipped with a log line when the
        flight lacks the conditions). A caller with its own pipeline passes
        ``expected_apparent_c=expected_module_apparent_c(flight, pipeline, strict=False)``.
    block_cache : dict, optional
        Prepared blocks kept between calls on the same ortho and modules (a new empty dict
        per registration): a block read through the same window with the same settings
        (``block_m`` aside, which only decides where the windows fall) is analysed once.
        Two block sizes that cut a site into the same number of blocks across and along
        give the same windows, so the second pass reuses the first one's blocks and
        differs only in its fit. The plausibility test's module samples are kept there too.

    Returns
    -------
    Registration
        ``shift_m`` is to be *added* to the layout coordinates (east, north) [m].

    Warns
    -----
    RegistrationWarning
        When the image constrains the fit weakly; no shift is applied then unless
        ``apply_weak`` is set.

    Raises
    ------
    RegistrationError
        When ``require`` is set and no confident fit is found.
    """
    cfg = _settings(settings)
    if not cfg["enabled"]:
        return Registration(message="registration disabled ([register] enabled = false)")
    tiles = list(orthos.tiles)
    notes: list[str] = []
    if tiles and getattr(modules, "crs", None) is not None and _tile_attr(tiles[0], "crs") is not None:
        from pyproj import CRS

        tc = CRS.from_user_input(_tile_attr(tiles[0], "crs"))
        if CRS.from_user_input(modules.crs) != tc:
            raise RegistrationError(f"layout CRS {CRS.from_user_input(modules.crs).to_string()} differs from the "
                                    f"ortho CRS {tc.to_string()}; reproject the modules first")
    geoms = np.asarray(modules.geometry.values, dtype=object) if len(modules) else np.zeros(0, object)
    import shapely

    valid_geom = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms)) if len(geoms) else np.zeros(0, bool)
    geoms = geoms[valid_geom]
    tree = shapely.STRtree(geoms) if len(geoms) else None

    # 1. plan blocks per tile
    plan = []
    for ti, tile in enumerate(tiles):
        name = _tile_attr(tile, "path") or _tile_attr(tile, "name") or f"tile {ti}"
        x0, b, r, t = _tile_attr(tile, "bounds")
        idx = tree.query(shapely.box(x0, b, r, t), predicate="intersects") if tree is not None else []
        if len(idx) == 0:
            notes.append(f"ortho tile {ti} ({name}): no layout module; ignored")
            continue
        sub = geoms[np.sort(idx)]
        gb = shapely.total_bounds(sub)
        gb = (max(gb[0], x0), max(gb[1], b), min(gb[2], r), min(gb[3], t))
        for win in _block_windows(tile, gb, cfg):
            plan.append((ti, tile, win))

    # 2. spectra of the blocks (a block depends on its window and on every setting but
    # block_m, which only placed the windows)
    cfg_key = repr(sorted((k, v) for k, v in cfg.items() if k != "block_m"))
    blocks: list[_BlockData] = []
    records: list[BlockShift] = []
    total = len(plan)
    for k, (ti, tile, win) in enumerate(plan):
        t = _tile_attr(tile, "transform")
        gsd = _tile_gsd(tile)
        f = max(1, int(math.floor(float(cfg["work_gsd_m"]) / gsd + 1e-6)))
        work_gsd = gsd * f
        win = Window(win.col_off, win.row_off, (int(win.width) // f) * f, (int(win.height) // f) * f)
        wb = (t @ (win.col_off, win.row_off + win.height), t @ (win.col_off + win.width, win.row_off))
        xs = [wb[0][0], wb[1][0]]
        ys = [wb[0][1], wb[1][1]]
        pad = float(cfg["max_shift_m"])
        box = shapely.box(min(xs) - pad, min(ys) - pad, max(xs) + pad, max(ys) + pad)
        gidx = tree.query(box, predicate="intersects") if tree is not None else np.zeros(0, int)
        key = (ti, int(win.col_off), int(win.row_off), int(win.width), int(win.height), f, cfg_key)
        if block_cache is not None and key in block_cache:
            bd, why = block_cache[key]
            # a fresh block record for this call (the fit below writes into it)
            bd = dataclasses.replace(bd) if bd is not None else None
        else:
            bd, why = _prepare_block(orthos, ti, tile, win, geoms[np.sort(gidx)], cfg, f, work_gsd)
            if block_cache is not None:
                block_cache[key] = (dataclasses.replace(bd) if bd is not None else None, why)
        cx, cy = t @ (win.col_off + win.width / 2.0, win.row_off + win.height / 2.0)
        if bd is None:
            records.append(BlockShift(float(cx), float(cy), float("nan"), float("nan"), 0.0, ti, note=why))
            logger.debug("register: block %d (tile %d) skipped: %s", k, ti, why)
        else:
            blocks.append(bd)
            records.append(BlockShift(bd.x, bd.y, float("nan"), float("nan"), 0.0, ti))
            bd.record = records[-1]
        if progress is not None:
            progress("register", k + 1, total)

    reg = Registration(notes=notes, follow_drift=bool(cfg["follow_drift"]))
    reg.blocks = records
    if not blocks:
        whys = sorted({r.note for r in records if r.note}) or ["no ortho tile contains layout modules"]
        return _finish_weak(reg, cfg, "no usable ortho block (" + "; ".join(whys) + ")")

    # 3. contrast sign by vote (intensity feature), then the peaks of that sign
    if cfg["feature"] == "gradient":
        sign = 1.0  # edge strengths correlate positively whatever the contrast's polarity
        reg.contrast = "edges"
    else:
        sign = 1.0 if sum(bd.vote for bd in blocks) >= 0 else -1.0
        reg.contrast = "warmer" if sign > 0 else "cooler"

    snr_min, snr_full = float(cfg["snr_min"]), float(cfg["snr_full"])
    dfull = float(cfg["distinct_full"])
    cands_all = []
    phys_all = []  # every candidate kept for the plausibility test, and the block's SNR
    keep_base = min(float(cfg["ambiguity_ratio"]), 0.5)
    for bd in blocks:
        snr, distinct, beyond, ext, med = bd.peaks[sign]
        best_h = ext[0][2]
        ratio = float(cfg["ambiguity_ratio"])
        # candidates down to half the best peak (the fit may re-admit one of them)
        kept = [c for c in ext if c[2] - med >= keep_base * (best_h - med)][:_MAX_CANDIDATES]
        # (all candidates, those within ambiguity_ratio of the best, height above median)
        cands = (kept, [c for c in kept if c[2] - med >= ratio * (best_h - med)], med)
        c_snr = min(max((snr - snr_min) / max(snr_full - snr_min, 1e-9), 0.0), 1.0)
        c_dis = min(max(distinct / max(dfull, 1e-9), 0.0), 1.0)
        conf = c_snr * c_dis
        rec = bd.record
        rec.snr, rec.distinctness, rec.candidates = snr, distinct, len(cands[1])
        if beyond is not None:
            conf = 0.0
            rec.note = (f"a stronger peak lies beyond max_shift_m, at ({beyond[0]:+.2f}, {beyond[1]:+.2f}) m")
        rec.confidence = float(conf)
        cands_all.append(cands)
        phys_all.append((ext, med, snr, beyond is None))

    # 4. consensus of confident blocks, then each block takes the candidate nearest to it
    def to_m(bd: _BlockData, drow: float, dcol: float) -> tuple[float, float]:
        d = bd.lin @ np.array([dcol, drow])
        return float(d[0]), float(d[1])

    best_m = np.array([to_m(bd, c[0][0][3], c[0][0][4]) for bd, c in zip(blocks, cands_all)])
    confs = np.array([bd.record.confidence for bd in blocks])
    if expected_apparent_c is None and flight is not None:
        expected_apparent_c = expected_module_apparent_c(flight, strict=False)
    exp_c = float(expected_apparent_c) if expected_apparent_c is not None else math.nan
    plausible = bool(cfg["plausibility"]) and math.isfinite(exp_c)
    switch, note = None, ""
    if confs.max() <= 0:
        for bd, bm in zip(blocks, best_m):
            bd.record.dx, bd.record.dy = float(bm[0]), float(bm[1])
        reg.measured_m = (float(np.median(best_m[:, 0])), float(np.median(best_m[:, 1])))
        if plausible:
            # no block is distinct: the glass temperature may still pick one candidate
            note, switch = _plausibility(orthos, tiles, geoms, blocks, phys_all, to_m, reg.measured_m,
                                         exp_c, cfg, block_cache)
        if switch is None:
            if note:
                reg.notes.append(note)
            return _finish_weak(reg, cfg, "the image does not constrain the layout position "
                                          "(no block has a distinct correlation peak)")
    cons = np.array([_weighted_median(best_m[:, 0], confs + 1e-12 * (confs <= 0)),
                     _weighted_median(best_m[:, 1], confs + 1e-12 * (confs <= 0))])
    def fit(lists: list[Any], cons: Any, conf_of: Callable[..., float] | None = None) -> tuple[Any, Any]:
        """Each block takes its candidate nearest ``cons``, then the robust fit of the field;
        sets the records and ``reg`` (model, residuals, measured shift, confidence)."""
        reg.model = None
        reg.residual_scale = reg.residual_rotation_deg = float("nan")
        reg.follow_drift = bool(cfg["follow_drift"])
        dxs, dys = [], []
        cm_all = []
        for bd, (all_c, cands, med) in zip(blocks, lists):
            rec = bd.record
            cm_all.append((np.array([to_m(bd, c[3], c[4]) for c in all_c]),
                           np.array([(c[2] - med) / max(all_c[0][2] - med, 1e-300) for c in all_c])))
            cm = np.array([to_m(bd, c[3], c[4]) for c in cands])
            k = int(np.argmin(np.hypot(cm[:, 0] - cons[0], cm[:, 1] - cons[1])))
            if conf_of is not None:
                # the plausibility test chose the shift: the block's confidence comes from
                # the chosen peak's own height and the test's margin
                if k != 0:
                    rec.note = (rec.note + "; " if rec.note else "") + \
                        f"took candidate {k + 1} of {len(cands)}, nearest the physically plausible shift"
                rec.confidence = conf_of(bd, cands[k], med)
            elif k != 0:
                rec.note = (rec.note + "; " if rec.note else "") + \
                    f"periodic ambiguity: took candidate {k + 1} of {len(cands)} nearest the consensus"
                # a block that needed the consensus to decide cannot add confidence of its own
                rec.confidence *= (cands[k][2] - med) / (cands[0][2] - med) if cands[0][2] > med else 0.0
                if rec.confidence <= 0:
                    rec.confidence = 1e-3
            rec.dx, rec.dy = float(cm[k, 0]), float(cm[k, 1])
            dxs.append(rec.dx)
            dys.append(rec.dy)

        # 5. robust fit
        x = np.array([bd.x for bd in blocks])
        y = np.array([bd.y for bd in blocks])
        dx = np.array(dxs)
        dy = np.array(dys)
        w = np.array([bd.record.confidence for bd in blocks])
        inl = w > 0
        reject = float(cfg["reject_m"])
        model = None
        for _ in range(6):
            if inl.sum() == 0:
                break
            use_sim = _spread_enough(x[inl], y[inl], float(cfg["block_m"]) * 0.25)
            if use_sim:
                model = _fit_similarity(x[inl], y[inl], dx[inl], dy[inl], w[inl])
                tx, ty, a, b, x0, y0 = model
                px = tx + a * (x - x0) - b * (y - y0)
                py = ty + b * (x - x0) + a * (y - y0)
            else:
                mx = _weighted_median(dx[inl], w[inl])
                my = _weighted_median(dy[inl], w[inl])
                model = None
                px, py = np.full_like(x, mx), np.full_like(y, my)
            res = np.hypot(dx - px, dy - py)
            for i in np.nonzero((w > 0) & (res > reject))[0]:
                # an outlier whose runner-up peak agrees with the fit took the wrong one of two
                # near-equal peaks (periodic rows): re-admit it with that peak
                cmi, hi = cm_all[i]
                d = np.hypot(cmi[:, 0] - px[i], cmi[:, 1] - py[i])
                j = int(np.argmin(d))
                if d[j] <= reject and hi[j] > 0:
                    rec = blocks[i].record
                    dx[i], dy[i] = cmi[j]
                    rec.dx, rec.dy = float(cmi[j, 0]), float(cmi[j, 1])
                    w[i] *= float(hi[j])
                    rec.confidence = float(w[i])
                    rec.note = (rec.note + "; " if rec.note else "") + \
                        f"periodic ambiguity: re-admitted with candidate {j + 1} near the fit"
                    res[i] = d[j]
            new = (w > 0) & (res <= reject)
            if not new.any():
                new = (w > 0) & (res <= np.min(res[w > 0]) + 1e-9)
            if np.array_equal(new, inl):
                break
            inl = new
        if model is None:
            cx = float(np.average(x[inl], weights=w[inl]))
            cy = float(np.average(y[inl], weights=w[inl]))
            mx = float(np.average(dx[inl], weights=w[inl]))
            my = float(np.average(dy[inl], weights=w[inl]))
            model_t = (mx, my, 0.0, 0.0, cx, cy)
            reg.model = None
        else:
            model_t = model
            reg.model = model
            a, b = model[2], model[3]
            reg.residual_scale = float(math.hypot(1.0 + a, b))
            reg.residual_rotation_deg = float(math.degrees(math.atan2(b, 1.0 + a)))
        for bd, ok, rs in zip(blocks, inl, res):
            rec = bd.record
            rec.used = bool(ok)
            if not ok and rec.confidence > 0:
                rec.note = (rec.note + "; " if rec.note else "") + f"outlier: {rs:.2f} m from the fit"
        # overall shift: the field at the centre of the layout
        lx0, ly0, lx1, ly1 = shapely.total_bounds(geoms)
        mxc, myc = (lx0 + lx1) / 2.0, (ly0 + ly1) / 2.0
        tx, ty, a, b, x0, y0 = model_t
        sx = tx + a * (mxc - x0) - b * (myc - y0)
        sy = ty + b * (mxc - x0) + a * (myc - y0)
        reg.measured_m = (float(sx), float(sy))
        if reg.model is not None:
            # the field is extrapolated to the whole layout: refuse implausible extrapolations
            # (blocks clustered in one corner) and use the single shift instead
            corners_x = np.array([lx0, lx0, lx1, lx1])
            corners_y = np.array([ly0, ly1, ly0, ly1])
            fx = tx + a * (corners_x - x0) - b * (corners_y - y0)
            fy = ty + b * (corners_x - x0) + a * (corners_y - y0)
            spread = float(np.max(np.hypot(fx - sx, fy - sy)))
            if spread > float(cfg["max_shift_m"]):
                reg.notes.append(f"shift field varies by {spread:.2f} m across the layout (more than "
                                 f"max_shift_m); one shift is used for all modules")
                reg.model = None
                reg.follow_drift = False
        # confidence: mean confidence of the used blocks times the weight fraction they hold
        wi = w[inl]
        conf = float(np.sum(wi * wi) / np.sum(wi)) * float(np.sum(wi) / np.sum(w)) if wi.sum() > 0 else 0.0
        reg.confidence = min(max(conf, 0.0), 1.0)
        return sx, sy

    n_notes = len(reg.notes)
    saved = [(bd.record.confidence, bd.record.note) for bd in blocks]
    if switch is None:
        sx, sy = fit(cands_all, cons)
        # 6. physical plausibility: among candidate shifts that score close to the best,
        # the module glass must look like sunlit modules at the flight's conditions
        if plausible:
            note, switch = _plausibility(orthos, tiles, geoms, blocks, phys_all, to_m, (sx, sy),
                                         exp_c, cfg, block_cache)
    if switch is not None:
        centre, factor = switch
        for bd, (c0, n0) in zip(blocks, saved):
            bd.record.confidence, bd.record.note = c0, n0
        del reg.notes[n_notes:]
        snr_scale = max(snr_full - snr_min, 1e-9)
        by_block = {id(b): e for b, e in zip(blocks, phys_all)}

        def conf_of(bd: _BlockData, cand: tuple[Any, ...], med: float) -> float:
            # the plausibility test, not the consensus, decided: the block keeps the
            # confidence of the chosen peak's own SNR, scaled by the test's margin
            ext, med_b, snr, ok = by_block[id(bd)]
            if not ok or ext[0][2] <= med_b:
                return 1e-3
            snr_c = snr * (cand[2] - med_b) / (ext[0][2] - med_b)
            return max(min(max((snr_c - snr_min) / snr_scale, 0.0), 1.0) * factor, 1e-3)

        lists = [(ext, ext, med) for ext, med, _, _ in phys_all]
        sx, sy = fit(lists, np.asarray(centre, float), conf_of)
    if note:
        reg.notes.append(note)
        logger.info("register: %s", note)
    inl = np.array([bool(bd.record.used) for bd in blocks], dtype=bool)

    n_used = int(inl.sum())
    desc = (f"measured shift ({sx:+.3f}, {sy:+.3f}) m from {n_used} of {len(records)} blocks, "
            f"confidence {reg.confidence:.2f}")
    if reg.confidence < float(cfg["min_confidence"]):
        return _finish_weak(reg, cfg, f"weak fit: {desc}")
    if math.hypot(sx, sy) < float(cfg["min_shift_m"]):
        reg.applied = False
        reg.shift_m = (0.0, 0.0)
        reg.message = f"{desc}; below min_shift_m = {cfg['min_shift_m']} m, not applied"
        logger.info("register: %s", reg.message)
        return reg
    reg.applied = True
    reg.shift_m = (float(sx), float(sy))
    reg.message = f"{desc}; applied" + (" (following drift)" if reg.follow_drift and reg.model else "")
    logger.info("register: %s", reg.message)
    return reg


def _finish_weak(reg: Registration, cfg: Mapping, why: str) -> Registration:
    if cfg["require"]:
        raise RegistrationError(f"[register] require = true: {why}")
    apply = bool(cfg["apply_weak"]) and all(math.isfinite(v) for v in reg.measured_m)
    if apply and math.hypot(*reg.measured_m) >= float(cfg["min_shift_m"]):
        reg.applied = True
        reg.shift_m = (float(reg.measured_m[0]), float(reg.measured_m[1]))
        reg.message = f"{why}; applied anyway (apply_weak = true)"
    else:
        reg.applied = False
        reg.shift_m = (0.0, 0.0)
        reg.message = f"{why}; layout used as drawn"
    warnings.warn(f"layout registration: {reg.message}", RegistrationWarning, stacklevel=3)
    logger.info("register: %s", reg.message)
    return reg


def apply_shift(modules: geopandas.GeoDataFrame,
                shift: Registration | tuple[float, float]) -> geopandas.GeoDataFrame:
    """A copy of ``modules`` with footprints and frame origins translated.

    Parameters
    ----------
    modules : geopandas.GeoDataFrame
        Modules with ``geometry`` and optionally the frame columns ``fx0``, ``fy0``.
    shift : Registration or (float, float)
        A :class:`Registration` (each module moves by its shift field at the module's
        centre; nothing moves when it was not applied) or a plain ``(dx, dy)`` [m].

    Returns
    -------
    geopandas.GeoDataFrame
        The input is not modified; the frame vectors (``fux`` ...) are unchanged.
    """
    import shapely

    out = modules.copy()
    n = len(out)
    if n == 0:
        return out
    geoms = np.asarray(out.geometry.values, dtype=object)
    if isinstance(shift, Registration):
        c = shapely.centroid(geoms)
        cx, cy = shapely.get_x(c), shapely.get_y(c)
        ok = np.isfinite(cx) & np.isfinite(cy)
        cx = np.where(ok, cx, 0.0)
        cy = np.where(ok, cy, 0.0)
        dx, dy = shift.shift_at(cx, cy)
        dx = np.asarray(dx, float).reshape(n)
        dy = np.asarray(dy, float).reshape(n)
    else:
        sx, sy = (float(v) for v in shift)
        dx = np.full(n, sx)
        dy = np.full(n, sy)
    if not (np.any(dx) or np.any(dy)):
        return out
    coords, idx = shapely.get_coordinates(geoms, return_index=True)
    coords = coords + np.column_stack([dx[idx], dy[idx]])
    moved = shapely.set_coordinates(geoms.copy(), coords)
    import geopandas

    out[out.geometry.name] = geopandas.GeoSeries(moved, index=out.index, crs=modules.crs)
    for col, d in (("fx0", dx), ("fy0", dy)):
        if col in out.columns:
            out[col] = out[col].to_numpy(dtype=float) + d
    return out


def align_flight(flight: Any, settings: Mapping | None = None, out_path: Any = None, *,
                 overwrite: bool = False, progress: ProgressFn | None = None
                 ) -> tuple[Registration, geopandas.GeoDataFrame]:
    """Register a flight's layout to its orthomosaic and optionally write the moved layout.

    Parameters
    ----------
    flight : Flight
        From :func:`pvscan.io.manifest.load_flight`.
    settings : Pipeline or mapping, optional
        A pipeline (its ``[register]`` section is used) or the section itself.
    out_path : path-like, optional
        GeoPackage to write: the module footprints moved onto the ortho, with all module
        properties, in the ortho's CRS (layer ``modules``). Written to a temporary sibling
        and renamed into place, so it is either absent or complete.
    overwrite : bool
        Replace an existing ``out_path``.
    progress : callable, optional

    Returns
    -------
    (Registration, geopandas.GeoDataFrame)
        The registration and the moved modules.

    Raises
    ------
    OutputError
        ``out_path`` exists without ``overwrite``, or cannot be written.
    """
    from pathlib import Path

    from pvscan.errors import OutputError
    from pvscan.io.layout import read_layout
    from pvscan.io.ortho import open_orthos

    if out_path is not None:
        out_path = Path(out_path)
        if out_path.suffix.lower() != ".gpkg":
            raise OutputError(f"{out_path}: the corrected layout is written as GeoPackage; use a .gpkg name")
        if out_path.exists() and not overwrite:
            raise OutputError(f"{out_path}: exists (use --overwrite to replace it)")
        if not out_path.parent.is_dir():
            raise OutputError(f"{out_path}: folder {out_path.parent} does not exist")
    with open_orthos(flight.flight.orthos, flight.ortho) as orthos:
        modules = read_layout(flight, orthos.crs)
        reg = estimate_shift(orthos, modules, settings, progress=progress, flight=flight)
    moved = apply_shift(modules, reg)
    if out_path is not None:
        from pvscan.io.outputs import atomic_path

        with atomic_path(out_path, suffix=".tmp.gpkg") as tmp:
            moved.reset_index(drop=True).to_file(tmp, layer="modules", driver="GPKG", engine="pyogrio")
    return reg, moved
