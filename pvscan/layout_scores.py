"""Scores of a module layout against a simulated flight's truth of where the modules are in
the ortho: :func:`evaluate_layout` (``pvscan layout score``) and, for an inspection run on a
layout detected in the ortho, the matching and scores :func:`pvscan.evaluate.evaluate` adds
(:func:`detected_match`, :func:`no_string_scores`).
"""
from __future__ import annotations

import json
from collections.abc import Mapping
from os import PathLike
from pathlib import Path
from typing import Any

import numpy as np

from pvscan.errors import OutputError, SimulationError

__all__ = ["STRING_CLASSES", "truth_in_ortho", "layout_scores", "evaluate_layout", "detected_match",
           "no_string_scores", "placement_error"]

#: Defect classes that follow a string from its negative end: they need string ids, so an
#: inspection on a layout detected in the ortho does not look for them.
STRING_CLASSES = ("open_string", "pid")


def truth_in_ortho(truth_dir: Path) -> Any:
    """The truth's module polygons where the modules are *in the ortho* (GeoDataFrame with
    ``module_id``): ``truth_ortho.geojson`` when the flight has one, else ``truth.geojson``
    shifted back by the ``layout_offset_m`` it was drawn with (``truth.json``)."""
    import geopandas as gpd

    ortho = truth_dir / "truth_ortho.geojson"
    try:
        if ortho.exists():
            return gpd.read_file(ortho)
        truth = gpd.read_file(truth_dir / "truth.geojson")
        with open(truth_dir / "truth.json", encoding="utf-8") as fh:
            offset = tuple(json.load(fh).get("layout_offset_m", [0.0, 0.0]))
    except Exception as exc:  # any reader failure (GDAL, JSON) is a bad input named by file
        raise SimulationError(f"{truth_dir}: cannot read the truth: {exc}") from None
    truth = truth.to_crs(truth.estimate_utm_crs())
    return truth.set_geometry(truth.geometry.translate(-float(offset[0]), -float(offset[1])))


def layout_scores(tg: np.ndarray, lg: np.ndarray, max_d: float) -> tuple[dict, np.ndarray]:
    """Found / extra / corner error of layout polygons ``lg`` against truth polygons ``tg``
    (shapely arrays, one projected CRS [m]); and the index of the layout module matched to
    each truth module (-1 when none)."""
    import shapely
    from scipy.spatial import cKDTree

    tc = shapely.get_coordinates(shapely.centroid(tg))
    lc = shapely.get_coordinates(shapely.centroid(lg))
    n_t, n_l = len(tc), len(lc)
    out: dict = {"truth_modules": n_t, "layout_modules": n_l}
    if n_l == 0 or n_t == 0:
        return ({**out, "found": 0, "found_fraction": 0.0, "extra": n_l, "extra_fraction": None,
                 "corner_error_m": None, "within_5cm": None}, np.full(n_t, -1))
    d, j = cKDTree(lc).query(tc)
    hit = d < max_d
    # one layout module matched by two truth modules counts once (the nearer)
    order = np.argsort(d, kind="stable")
    seen: set[int] = set()
    for i in order:
        if hit[i]:
            if int(j[i]) in seen:
                hit[i] = False
            else:
                seen.add(int(j[i]))
    errs = []
    for i in np.flatnonzero(hit):
        a = shapely.get_coordinates(tg[i])[:4]
        b = shapely.get_coordinates(lg[j[i]])[:4]
        errs.append(float(np.max(np.min(np.hypot(a[:, None, 0] - b[None, :, 0], a[:, None, 1] - b[None, :, 1]),
                                        axis=1))))
    e = np.array(errs)
    found = int(hit.sum())
    return ({**out, "found": found, "found_fraction": found / n_t, "extra": n_l - found,
             "extra_fraction": (n_l - found) / n_t,
             "corner_error_m": {"median": float(np.median(e)), "p95": float(np.percentile(e, 95)),
                                "max": float(e.max())} if e.size else None,
             "within_5cm": float((e <= 0.05).mean()) if e.size else None},
            np.where(hit, j, -1))


def evaluate_layout(truth_dir: str | PathLike[str], layout_path: str | PathLike[str],
                    settings: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Score a detected module layout against a simulated flight's truth.

    The truth's module polygons are where the modules are *in the ortho*: ``truth_ortho.geojson``
    when the flight has one, else ``truth.geojson`` shifted back by the ``layout_offset_m``
    it was drawn with (``truth.json``).

    Parameters
    ----------
    truth_dir : path-like
        A folder written by ``pvscan simulate``.
    layout_path : path-like
        The layout to score (any file GeoPandas reads; layer ``modules`` of a GeoPackage).
    settings : mapping, optional
        ``[evaluate]``: ``match_distance_m`` (largest centroid distance of a match) [m].

    Returns
    -------
    dict
        ``truth_modules``, ``layout_modules``, ``found`` (matched truth modules),
        ``found_fraction``, ``extra`` (layout modules matching no truth module),
        ``extra_fraction`` (of the truth's count), ``corner_error_m`` (per matched module the
        largest distance of a truth corner to the nearest layout corner [m]: ``median``,
        ``p95``, ``max``) and ``within_5cm`` (fraction of matched modules whose corner error is
        at most 0.05 m).
    """
    import geopandas as gpd

    truth_dir, layout_path = Path(truth_dir), Path(layout_path)
    max_d = float((settings or {}).get("match_distance_m", 0.5))
    truth = truth_in_ortho(truth_dir)
    try:
        layers = list(gpd.list_layers(layout_path)["name"])
        layout = gpd.read_file(layout_path, layer="modules" if "modules" in layers else None)
    except Exception as exc:  # any reader failure is a bad input named by file
        raise OutputError(f"{layout_path}: cannot read the layout: {exc}") from None
    if layout.crs is None or not layout.crs.is_projected:
        raise OutputError(f"{layout_path}: the layout needs a projected CRS in metres")
    truth = truth.to_crs(layout.crs)
    return layout_scores(np.asarray(truth.geometry.to_numpy()), np.asarray(layout.geometry.to_numpy()), max_d)[0]


def detected_match(truth_dir: Path, tf: list, rf: list, max_d: float) -> tuple[dict, np.ndarray]:
    """Layout scores of a result's modules (a layout detected in the ortho) and the result
    feature matched to each truth feature (by position in the ortho; -1 when none)."""
    import geopandas as gpd
    import shapely

    pos = truth_in_ortho(truth_dir)
    by_id = {str(m): k for k, m in enumerate(pos["module_id"].astype(str))}
    idx = [by_id.get(str(f["properties"]["module_id"]), -1) for f in tf]
    if min(idx, default=0) < 0:
        raise SimulationError(f"{truth_dir}: the truth's modules in the ortho miss some module_id of truth.geojson")
    tg = np.asarray(pos.geometry.to_numpy())[idx]
    geoms = [shapely.geometry.shape(f["geometry"]) if f.get("geometry") else None for f in rf]
    res = gpd.GeoSeries(geoms, crs="EPSG:4326").to_crs(pos.crs)
    return layout_scores(tg, np.asarray(res.to_numpy()), max_d)


def no_string_scores(t_def: list, p_def: list, match: np.ndarray, rf: list) -> dict:
    """Module recall and precision over the classes that need no string ids: truth modules of
    :data:`STRING_CLASSES` are left out; a result module matched to no truth module (an extra
    one) and flagged counts as a false alarm. ``class_right``: defective modules found with
    their true class; ``recall_in_layout``: the recall over the defective modules the detected
    layout holds (what the classification does on it, apart from the modules not found)."""
    from pvscan.evaluate import _defect, _f, _ratio

    keep = np.array([d not in STRING_CLASSES for d in t_def], bool)
    t_bad = np.array([d is not None for d in t_def], bool) & keep
    p_bad = np.array([d is not None for d in p_def], bool) & keep
    used = set(int(k) for k in match if k >= 0)
    extra_flagged = sum(1 for k, f in enumerate(rf) if k not in used
                        and _defect(f.get("properties", {}).get("defect")) is not None)
    tp = int((t_bad & p_bad).sum())
    held = t_bad & (np.asarray(match) >= 0)
    fp = int((~t_bad & p_bad).sum()) + extra_flagged
    right = sum(1 for a, b, k in zip(t_def, p_def, keep) if k and a is not None and a == b)
    n_true = int(t_bad.sum())
    return {"no_string_classes": {"excluded": list(STRING_CLASSES), "n_true": n_true, "true_positive": tp,
                                  "false_positive": fp, "extra_flagged": extra_flagged,
                                  "recall": _f(_ratio(tp, n_true)), "precision": _f(_ratio(tp, tp + fp)),
                                  "n_true_in_layout": int(held.sum()),
                                  "recall_in_layout": _f(_ratio(int((held & p_bad).sum()), int(held.sum()))),
                                  "class_right": _f(_ratio(right, n_true))}}


def _placed(xy: np.ndarray, reg: Mapping[str, Any], tables: list, rows: list) -> np.ndarray:
    """Drawn module centres ``xy`` (ortho CRS) [m] moved as a registration record says.

    ``placement`` (when the record has one): ``c + scale * R(rotation) (p - c) + shift``, then
    the translation of the module's table (``tables``) and of its table row (``rows``); without
    one, ``layout_shift_m``. Written here from the record's documented meaning, not with the
    pipeline's own placement code, so an error in either shows.
    """
    pl = reg.get("placement") if isinstance(reg.get("placement"), Mapping) else None
    if pl:
        c = np.asarray(pl["centre"], dtype=float)
        a = np.radians(float(pl["rotation_deg"]))
        m = float(pl["scale"]) * np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
        out = c + (xy - c) @ m.T + np.asarray(pl["shift_m"], dtype=float)
    else:
        out = xy + np.asarray(reg.get("layout_shift_m") or [0.0, 0.0], dtype=float)
    by_table = {str(t["table_id"]): (float(t["dx_m"]), float(t["dy_m"])) for t in reg.get("tables") or []}
    by_row = {(str(r["table_id"]), int(r["table_row"])): (float(r["dx_m"]), float(r["dy_m"]))
              for r in reg.get("rows") or [] if r.get("table_row") is not None}
    for i, (t, r) in enumerate(zip(tables, rows)):
        out[i] += by_table.get(str(t), (0.0, 0.0))
        if r is not None:
            out[i] += by_row.get((str(t), int(r)), (0.0, 0.0))
    return out


def placement_error(truth_dir: Path, tf: list, rf: list, match: np.ndarray, reg: Mapping[str, Any] | None,
                    layout_shift_m: Any) -> dict[str, Any] | None:
    """How far the footprints a result measured sat from the modules in the ortho [m].

    The result's modules (``rf``, drawn positions, lon/lat) are moved as its registration record
    ``reg`` (summary.json ``registration``) says, then their centres compared with the centres
    of the matched truth modules in the ortho (:func:`truth_in_ortho`, found by the module_id of
    the truth feature ``tf[i]``; ``match[i]`` the result feature of truth module ``i``, so a
    result whose ids differ from the truth's is compared module by module all the same).
    Median, 95th percentile and largest distance; ``None`` when nothing is matched. Unlike the
    reported shift against the drawn offset, this sees rotation, scale and table-by-table errors
    of the placement.
    """
    import geopandas as gpd
    import shapely

    pos = truth_in_ortho(truth_dir)
    if len(pos) == 0:
        return None
    reg = dict(reg or {})
    if "layout_shift_m" not in reg and layout_shift_m is not None:
        reg["layout_shift_m"] = layout_shift_m
    by_id = {str(m): k for k, m in enumerate(pos["module_id"].astype(str))}
    pairs = [(by_id.get(str(tf[i]["properties"].get("module_id")), -1), int(k))
             for i, k in enumerate(np.asarray(match).tolist()) if k >= 0]
    pairs = [(t, k) for t, k in pairs if t >= 0 and rf[k].get("geometry")]
    if not pairs:
        return None
    geoms = [shapely.geometry.shape(rf[k]["geometry"]) for _, k in pairs]
    drawn = gpd.GeoSeries(geoms, crs="EPSG:4326").to_crs(pos.crs)
    xy = shapely.get_coordinates(shapely.centroid(np.asarray(drawn.to_numpy())))
    props = [rf[k]["properties"] for _, k in pairs]
    placed = _placed(xy, reg, [p.get("table_id") for p in props], [p.get("table_row") for p in props])
    truth_xy = shapely.get_coordinates(shapely.centroid(np.asarray(pos.geometry.to_numpy())[[t for t, _ in pairs]]))
    d = np.hypot(*(placed - truth_xy).T)
    return {"n": int(len(d)), "median_m": float(np.median(d)), "p95_m": float(np.percentile(d, 95)),
            "max_m": float(d.max())}
