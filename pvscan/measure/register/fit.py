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
proposal has to show that it puts footprints on glass better before it is used.
"""
from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np

from pvscan.errors import RegistrationWarning
from pvscan.measure.register._blocks import _settings
from pvscan.measure.register._records import Registration
from pvscan.measure.register.estimate import estimate_shift
from pvscan.measure.register.evidence import (
    Placement,
    evidence,
    module_spread,
    placement_quality,
    refine_placement,
    sample_modules,
)

logger = logging.getLogger(__name__)

__all__ = ["register_layout", "apply_placement", "placement_of", "align_layout", "FRAME_COLUMNS"]

#: Internal module-frame columns, left out of a corrected layout file.
FRAME_COLUMNS = ("fx0", "fy0", "fux", "fuy", "fvx", "fvy")


def _centre(modules) -> tuple[float, float]:
    b = modules.total_bounds
    return float((b[0] + b[2]) / 2.0), float((b[1] + b[3]) / 2.0)


def placement_of(reg: Registration, centre: tuple[float, float]) -> Placement | None:
    """The placement a block fit measured (its shift field, or its one measured shift)."""
    cx, cy = centre
    if reg.model is not None:
        tx, ty, a, b, x0, y0 = reg.model
        s = math.hypot(1.0 + a, b)
        th = math.degrees(math.atan2(b, 1.0 + a))
        sx = tx + a * (cx - x0) - b * (cy - y0)
        sy = ty + b * (cx - x0) + a * (cy - y0)
        return Placement(float(sx), float(sy), float(th), float(s), cx, cy)
    mx, my = reg.measured_m
    if math.isfinite(mx) and math.isfinite(my):
        return Placement(float(mx), float(my), 0.0, 1.0, cx, cy)
    return None


def apply_placement(modules, placement: Placement | None):
    """A copy of ``modules`` with footprints and module frames moved by ``placement``."""
    import geopandas
    import shapely

    out = modules.copy()
    if placement is None or placement.is_identity() or len(out) == 0:
        return out
    geoms = np.asarray(out.geometry.values, dtype=object)
    coords, idx = shapely.get_coordinates(geoms, return_index=True)
    x, y = placement.apply(coords[:, 0], coords[:, 1])
    moved = shapely.set_coordinates(geoms.copy(), np.column_stack([x, y]))
    out[out.geometry.name] = geopandas.GeoSeries(moved, index=out.index, crs=modules.crs)
    if "fx0" in out.columns:
        ox, oy = placement.apply(out["fx0"].to_numpy(float), out["fy0"].to_numpy(float))
        out["fx0"], out["fy0"] = ox, oy
        m = placement.matrix
        for a, b in (("fux", "fuy"), ("fvx", "fvy")):
            if a in out.columns:
                ax, ay = out[a].to_numpy(float), out[b].to_numpy(float)
                out[a], out[b] = m[0, 0] * ax + m[0, 1] * ay, m[1, 0] * ax + m[1, 1] * ay
    return out


def _sample_at(orthos, modules, placement: Placement | None, cfg: Mapping):
    moved = apply_placement(modules, placement) if placement is not None else modules
    return sample_modules(orthos, moved, n=int(cfg["evidence_modules"]), margin_m=float(cfg["evidence_margin_m"]),
                          reduce=1, seed=0)


def _judge(sample, placement: Placement, cfg: Mapping, sun, expected_c=None) -> dict:
    q = placement_quality(sample, placement, cfg, sun=sun, expected_c=expected_c)
    return {k: (round(float(v), 4) if isinstance(v, float) and math.isfinite(v) else v) for k, v in q.items()}


def register_layout(orthos: Any, modules, settings: Mapping | None = None, *, sun=None,
                    expected_apparent_c: float | None = None, progress=None,
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
    centre = _centre(modules)
    ident = Placement(cx=centre[0], cy=centre[1])
    bounds = modules.total_bounds
    proposals: list[Placement] = []
    if forced_shift is not None:
        reg = Registration(notes=[f"shift given by the user: ({forced_shift[0]:+.3f}, {forced_shift[1]:+.3f}) m"])
        proposals.append(ident.moved(tx=float(forced_shift[0]), ty=float(forced_shift[1])))
        refine = False
    else:
        extent = max(float(bounds[2] - bounds[0]), float(bounds[3] - bounds[1]))
        # besides the configured blocks, at least min_blocks_across blocks across the site, so
        # that rotation and scale are measured on a small site too (one block: a shift only)
        small = min(float(cfg["block_m"]), max(float(cfg["min_block_m"]), extent / float(cfg["min_blocks_across"])))
        reg = None
        for block in dict.fromkeys([float(cfg["block_m"]), small]):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RegistrationWarning)
                r = estimate_shift(orthos, modules, {**cfg, "block_m": block}, progress=progress,
                                   expected_apparent_c=expected_apparent_c)
            reg = r if reg is None else reg
            p = placement_of(r, centre)
            if p is not None:
                proposals.append(p)
        assert reg is not None
        refine = True
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
    chosen, q_c = None, None
    for cand in proposals:
        s_c = _sample_at(orthos, modules, cand, cfg)
        # the sample was read around the proposal: it is the identity of that sample
        refined = Placement(cx=centre[0], cy=centre[1])
        if refine:
            for inset in cfg["evidence_insets"]:
                refined, _ = refine_placement(s_c, refined, {**cfg, "evidence_inset": float(inset)},
                                              rotate=bool(cfg["fit_rotation"]), scale=bool(cfg["fit_scale"]))
            refined = _resolve_pitch(s_c, refined, _pitches(modules), cfg)
        q = _judge(s_c, refined, cfg, sun, expected_apparent_c)
        pl = _compose(cand, refined)
        move = pl.displacement_max(bounds)
        reg.evidence["proposals"].append({**q, **pl.to_dict(), "largest_move_m": round(move, 4)})
        usable = q["ok"] and (forced_shift is not None or (
            q["evidence"] < (1.0 - gate) * q_id["evidence"]
            # a layout that already sits on the modules is refined only within a small radius:
            # a larger move of a periodic field is more likely an alias than a correction
            and (not q_id["ok"] or move <= radius)))
        if usable and move >= float(cfg["min_shift_m"]) and (q_c is None or q["evidence"] < q_c["evidence"]):
            chosen, q_c = pl, q
    if forced_shift is not None:
        # a known offset is used as given; the evidence only says whether it fits
        q_c = reg.evidence["proposals"][0]
        chosen = ident.moved(tx=float(forced_shift[0]), ty=float(forced_shift[1]))
        reg.placement = chosen
        reg.applied = True
        reg.model = chosen.shift_model()
        reg.follow_drift = True
        reg.shift_m = (chosen.tx, chosen.ty)
        reg.status = "ok" if q_c["ok"] else "failed"
        reg.evidence["used"] = "given"
        reg.message = (f"layout moved by the given shift ({chosen.tx:+.3f}, {chosen.ty:+.3f}) m: module evidence "
                       f"{q_id['evidence']:.3f} -> {q_c['evidence']:.3f} (probe ratios {q_c['ratio_u']:.2f}, "
                       f"{q_c['ratio_v']:.2f}; at most {lim:g}"
                       + ("" if q_c["ok"] else "; the footprints do not sit on glass there") + ")")
    elif chosen is not None and q_c is not None:
        reg.placement = chosen
        reg.applied = True
        reg.model = chosen.shift_model()
        reg.follow_drift = True
        reg.shift_m = (chosen.tx, chosen.ty)
        reg.residual_rotation_deg, reg.residual_scale = chosen.theta_deg, chosen.scale
        reg.status = "ok"
        reg.evidence["used"] = "proposal"
        reg.message = (f"layout moved by ({chosen.tx:+.3f}, {chosen.ty:+.3f}) m, rotated {chosen.theta_deg:+.3f} deg, "
                       f"scaled {chosen.scale:.5f}: module evidence {q_id['evidence']:.3f} -> "
                       f"{q_c['evidence']:.3f} (probe ratios {q_c['ratio_u']:.2f}, {q_c['ratio_v']:.2f}; "
                       f"limit {lim:g})")
    elif q_id["ok"]:
        reg.placement = ident
        reg.status = "ok"
        reg.evidence["used"] = "drawn"
        why = ("no proposal" if not proposals else
               "no proposal put footprints on glass better than the layout as drawn")
        reg.message = (f"layout used as drawn ({why}): module evidence {q_id['evidence']:.3f}, probe ratios "
                       f"{q_id['ratio_u']:.2f}, {q_id['ratio_v']:.2f} (limit {lim:g})")
        _no_move(reg)
    else:
        reg.placement = ident
        reg.status = "failed"
        reg.evidence["used"] = "none"
        qs = [q_id] + list(reg.evidence["proposals"])
        best = min(qs, key=lambda q: max(_num(q.get("ratio_u")), _num(q.get("ratio_v"))))
        reg.message = ("the layout could not be placed on the modules of the ortho: footprints do not sit on glass "
                       f"(best probe ratios {_num(best.get('ratio_u')):.2f}, {_num(best.get('ratio_v')):.2f}; at most "
                       f"{lim:g} needed)")
        _no_move(reg)
    logger.info("register: %s", reg.message)
    return reg


def _pitches(modules) -> list[np.ndarray]:
    """Median vectors from a module to its next neighbour along a table row and across it [m]."""
    import pandas as pd

    need = {"table_id", "table_row", "table_col", "fx0", "fy0", "fux", "fuy", "fvx", "fvy"}
    if not need <= set(modules.columns):
        return []
    cx = modules["fx0"].to_numpy(float) + 0.5 * (modules["fux"].to_numpy(float) + modules["fvx"].to_numpy(float))
    cy = modules["fy0"].to_numpy(float) + 0.5 * (modules["fuy"].to_numpy(float) + modules["fvy"].to_numpy(float))
    df = pd.DataFrame({"t": modules["table_id"].astype(str).to_numpy(), "r": modules["table_row"].to_numpy(),
                       "c": modules["table_col"].to_numpy(), "x": cx, "y": cy})
    out = []
    for key, step in (("r", "c"), ("c", "r")):
        d = df.sort_values(["t", key, step])
        same = (d["t"].to_numpy()[1:] == d["t"].to_numpy()[:-1]) & (d[key].to_numpy()[1:] == d[key].to_numpy()[:-1]) & (
            np.diff(d[step].to_numpy()) == 1)
        if same.any():
            dx = np.diff(d["x"].to_numpy())[same]
            dy = np.diff(d["y"].to_numpy())[same]
            v = np.array([np.median(dx), np.median(dy)])
            if np.all(np.isfinite(v)) and np.hypot(*v) > 0:
                out.append(v)
    return out


def _resolve_pitch(sample, placement: Placement, pitches, cfg: Mapping) -> Placement:
    """Rows of modules are periodic: the placement one module pitch along or across a row
    fits almost as well; only table ends and array edges tell. Each neighbour placement
    (one pitch either way) is refined by translation and the one with the least evidence
    kept."""
    fine = {**cfg, "evidence_inset": float(cfg["evidence_insets"][-1])}
    kw = {"inset_u": fine["evidence_inset"], "inset_v": fine["evidence_inset"], "band_m": float(cfg["evidence_band_m"]),
          "off_glass_k": float(cfg["evidence_off_glass_k"])}
    best = placement
    fb = evidence(module_spread(sample, placement, **kw))
    for v in pitches:
        for sgn in (1.0, -1.0):
            p = placement.moved(tx=placement.tx + sgn * v[0], ty=placement.ty + sgn * v[1])
            p, fp = refine_placement(sample, p, {**fine, "evidence_step_m": float(cfg["evidence_step_m"]) / 2.0},
                                     rotate=False, scale=False)
            if math.isfinite(fp) and fp < fb:
                best, fb = p, fp
    return best


def _compose(outer: Placement, inner: Placement) -> Placement:
    """``inner`` after ``outer`` (both about the same centre): one placement."""
    m = inner.matrix @ outer.matrix
    t = inner.matrix @ np.array([outer.tx, outer.ty]) + np.array([inner.tx, inner.ty])
    th = math.degrees(math.atan2(m[1, 0], m[0, 0]))
    return Placement(float(t[0]), float(t[1]), th, float(math.hypot(m[0, 0], m[1, 0])), outer.cx, outer.cy)


def _num(v) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return float("inf")
    return f if math.isfinite(f) else float("inf")


def _no_move(reg: Registration) -> Registration:
    reg.applied = False
    reg.shift_m = (0.0, 0.0)
    reg.model = None
    return reg


def align_layout(flight: Any, settings: Mapping | None = None, out_path: Any = None, *, overwrite: bool = False,
                 progress=None):
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
    from pvscan.measure.register.physics import expected_module_apparent_c

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
        c = modules.to_crs(4326).geometry.union_all().centroid
        sun = sun_vector(float(c.x), float(c.y), flight.flight.start + (flight.flight.end - flight.flight.start) / 2)
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
                out.to_crs(4326).to_file(tmp, driver="GeoJSON", engine="pyogrio", RFC7946="YES",
                                         COORDINATE_PRECISION=7)
    return reg, moved
