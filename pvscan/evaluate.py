"""Score an inspection result against the ground truth of a simulated flight.

:func:`evaluate` reads ``truth.geojson`` (written by :mod:`pvscan.simulate`) and the result's
``modules.geojson`` (plus ``anomalies.geojson`` and ``summary.json`` when present) and returns
a dict of scores:

- module level (defective vs healthy): precision, recall, F1, false alarms per 1,000
  healthy modules, and the false alarms counted by the distractor (seam, reflection,
  cloud shadow, hot object, or none) the truth records at the module;
- per class: recall and precision with the right class, and the confusion matrix
  (truth class x predicted class, ``none`` for healthy);
- power loss: predicted / true total, absolute and relative error, and per anomaly
  (bypassed substrings, open modules and strings, PID strings) the relative error of the
  loss summed over the anomaly's modules;
- temperatures: RMSE and bias of ``t_median_c`` against ``t_true_median_c`` of healthy
  modules (also of those with no distractor at them); median absolute error of ``delta_t_norm_k``
  of defective modules (from the matching anomaly when there is one, else from modules.geojson);
- co-registration: the layout shift the result reports against the offset the truth drew and,
  where the flight has the modules' true positions in the ortho (``truth_ortho.geojson``), how
  far the measured footprints (the drawn layout moved as the registration record says: shift,
  rotation, scale, tables, rows) sat from them (``placed_error_m``: median, p95, largest);
- missed defects (``missed``): each truly defective module the result calls healthy, with its
  true rise (``delta_t_k`` of the truth) over the robust spread of the measured ``delta_t_k`` of
  the truly healthy modules (the scatter a detector has to see a defect through), and how many
  of them rise less than ``faint_contrast`` times that spread: a miss of a faint defect is a
  limit of the flight (the result should then say it is unsure), a miss of a clear one a
  fault of the method.

Modules are matched by ``module_id``; when fewer than ``min_id_match_fraction`` of the ids
match, or the matched modules do not sit where the truth has them (a layout of tables split
with other ids or columns numbered from the other end), by the nearest centroid within
``match_distance_m`` (pipeline section ``[evaluate]``).
"""
from __future__ import annotations

import json
import logging
import math
from collections.abc import Mapping, Sequence
from datetime import datetime
from os import PathLike
from pathlib import Path
from typing import Any

import numpy as np

from pvscan._typing import IntArray
from pvscan.errors import OutputError, SimulationError
from pvscan.io.geojson import read_feature_collection
from pvscan.io.records import as_float as _num
from pvscan.layout_scores import STRING_CLASSES, detected_match, evaluate_layout, no_string_scores, placement_error

__all__ = ["evaluate", "format_report", "flight_identity_check", "LOSS_GROUP_KINDS", "evaluate_layout",
           "STRING_CLASSES"]

log = logging.getLogger(__name__)

#: Defect kinds whose power loss is scored per anomaly (per defect instance).
LOSS_GROUP_KINDS = ("bypassed_substring", "several_bypassed_substrings", "open_module", "open_string", "pid")


def _centroid(geom: Mapping[str, Any] | None) -> tuple[float, float]:
    if not geom:
        return (math.nan, math.nan)
    coords: Any = geom.get("coordinates")
    if geom.get("type") == "MultiPolygon":
        coords = coords[0]
    ring = np.asarray(coords[0], float)[:, :2]
    if len(ring) > 1 and np.allclose(ring[0], ring[-1]):
        ring = ring[:-1]
    return tuple(ring.mean(axis=0))


def _defect(v: Any) -> str | None:
    if v is None or (isinstance(v, float) and math.isnan(v)) or v in ("", "none", "None"):
        return None
    return str(v)


def _match(truth_feats: Sequence[Mapping[str, Any]], res_feats: Sequence[Mapping[str, Any]], epsg: int | None,
           min_id_fraction: float = 0.9, max_dist_m: float = 0.5) -> tuple[IntArray, str]:
    """Index of the result feature of each truth module (-1 when none), and how.

    By ``module_id`` when at least ``min_id_fraction`` of the truth's ids are found *and*
    at least that fraction of the pairs also sit within ``max_dist_m`` of each other (ids
    of split tables can coincide while numbering the columns from the other end);
    otherwise by nearest centroid within ``max_dist_m``.
    """
    ids: dict[str, int] = {}
    for k, f in enumerate(res_feats):
        mid = f.get("properties", {}).get("module_id")
        if mid is not None:
            ids.setdefault(str(mid), k)
    by_id = np.array([ids.get(str(f["properties"]["module_id"]), -1) for f in truth_feats])
    if not res_feats:
        return by_id, "module_id"
    from pyproj import Transformer
    from scipy.spatial import cKDTree

    tc = np.array([_centroid(f.get("geometry")) for f in truth_feats])
    rc = np.array([_centroid(f.get("geometry")) for f in res_feats])
    if epsg is None:
        lon, lat = np.nanmean(tc, axis=0)
        from pvscan.simulate.geometry import utm_epsg

        epsg = utm_epsg(lon, lat)
    tr = Transformer.from_crs("EPSG:4326", f"EPSG:{epsg}", always_xy=True)
    tx, ty = tr.transform(tc[:, 0], tc[:, 1])
    rx, ry = tr.transform(rc[:, 0], rc[:, 1])
    found = by_id >= 0
    if found.mean() >= min_id_fraction:
        j = by_id[found]
        dist = np.hypot(tx[found] - rx[j], ty[found] - ry[j])
        no_geom = ~np.isfinite(dist)
        if (no_geom | (dist < max_dist_m)).mean() >= min_id_fraction:
            return by_id, "module_id"
        log.warning("module ids match but %.0f %% of them sit more than %.2f m apart; matching by position",
                    100 * (dist >= max_dist_m).mean(), max_dist_m)
    ok = np.isfinite(rx) & np.isfinite(ry)
    if not ok.any():
        return by_id, "module_id"
    tree = cKDTree(np.stack([rx[ok], ry[ok]], axis=1))
    d, k = tree.query(np.stack([tx, ty], axis=1))
    cand = np.flatnonzero(ok)[np.minimum(k, ok.sum() - 1)]
    return np.where(d < max_dist_m, cand, -1), "centroid"


def _missed(tp: Sequence[Mapping[str, Any]], rp: Sequence[Mapping[str, Any]], match: IntArray,
            t_def: Sequence[str | None], p_bad: np.ndarray, faint_contrast: float) -> dict[str, Any]:
    """The truly defective modules the result calls healthy, with their contrast.

    Contrast = true rise of the module (``delta_t_k`` of the truth) [K] / robust spread (1.4826
    MAD) of the measured ``delta_t_k`` of the truly healthy matched modules [K]; below
    ``faint_contrast`` a miss counts as faint. ``recall_clear``: the share of the truly defective
    modules at or above ``faint_contrast`` (or of unknown contrast) that the result calls defective
    (None when there is none): the recall of the method where the flight lets a defect be seen.
    """
    t_bad = np.array([d is not None for d in t_def], dtype=bool)
    healthy = np.asarray([_num(rp[k].get("delta_t_k")) for i, k in enumerate(match.tolist())
                          if k >= 0 and not t_bad[i]], dtype=float)
    healthy = healthy[np.isfinite(healthy)]
    # 1.4826 x the median absolute deviation (Hampel 1974), written here: the yardstick uses
    # none of the pipeline's statistics
    spread = (1.4826 * float(np.median(np.abs(healthy - np.median(healthy)))) if len(healthy) >= 3
              else math.nan)
    mods: list[dict[str, Any]] = []
    faint = 0
    # every truly defective module, found or not: a faint one (rise below faint_contrast x the
    # spread) is a limit of the flight; recall over the others scores the method alone
    clear_true = clear_found = 0
    for i in np.flatnonzero(t_bad).tolist():
        rise = _num(tp[i].get("delta_t_k"))
        c = rise / spread if np.isfinite(rise) and np.isfinite(spread) and spread > 0 else math.nan
        if not (np.isfinite(c) and c < faint_contrast):
            clear_true += 1
            clear_found += int(bool(p_bad[i]))
    for i in np.flatnonzero(t_bad & ~p_bad).tolist():
        rise = _num(tp[i].get("delta_t_k"))
        contrast = rise / spread if np.isfinite(rise) and np.isfinite(spread) and spread > 0 else math.nan
        k = int(match[i])
        mods.append({"module_id": tp[i].get("module_id"), "defect": t_def[i], "true_delta_t_k": _f(rise),
                     "measured_delta_t_k": _f(_num(rp[k].get("delta_t_k")) if k >= 0 else math.nan),
                     "contrast": _f(contrast)})
        faint += int(bool(np.isfinite(contrast)) and contrast < faint_contrast)
    return {"healthy_spread_k": _f(spread), "faint_contrast": faint_contrast, "n_missed": len(mods),
            "n_faint": faint, "n_clear_true": clear_true, "n_clear_found": clear_found,
            "recall_clear": _f(clear_found / clear_true if clear_true else None), "modules": mods}


def _ratio(a: float, b: float) -> float | None:
    return None if b == 0 or not np.isfinite(a) or not np.isfinite(b) else float(a / b)


def _f(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return None if not math.isfinite(x) else round(x, 6)


def _when(value: object) -> datetime | None:
    """An aware datetime from ISO 8601 text, None when it is not one."""
    try:
        t = datetime.fromisoformat(str(value).replace("Z", "+00:00"))
    except ValueError:
        return None
    return t if t.tzinfo is not None else None


def flight_identity_check(truth_path: Path, meta: Mapping[str, Any], result_dir: Path,
                          force: bool = False) -> dict[str, Any]:
    """Check that a truth and a result are of the same flight: site, flight id, start time.

    The truth's side comes from the ``flight.toml`` beside ``truth.geojson`` (else from the
    truth's own ``pvscan_truth`` record), the result's from its ``summary.json``. Only what
    both sides state is compared.

    Returns
    -------
    dict
        ``checked`` (names compared), ``differences`` (one line each), ``forced``.

    Raises
    ------
    MismatchError
        When they differ and ``force`` is false.
    """
    from pvscan.errors import ManifestError, MismatchError

    truth_side: dict[str, Any] = {"site": meta.get("site"),
                        "start": ((meta.get("scenario_settings") or {}).get("flight") or {}).get("start")}
    manifest = truth_path.parent / "flight.toml"
    if manifest.is_file():
        from pvscan.io.manifest import load_flight

        try:
            fl = load_flight(manifest, check_files=False)
            truth_side = {"site": fl.site.name, "flight_id": fl.flight.id, "start": fl.flight.start.isoformat()}
        except ManifestError as exc:
            log.warning("%s: cannot read the flight's identity: %s", manifest, exc)
    summary_path = result_dir / "summary.json"
    result_side: dict[str, Any] = {}
    if summary_path.is_file():
        try:
            summary = json.loads(summary_path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise OutputError(f"{summary_path}: not valid JSON: {exc}") from None
        site = summary.get("site") if isinstance(summary, dict) else None
        flight = summary.get("flight") if isinstance(summary, dict) else None
        result_side = {"site": site.get("name") if isinstance(site, dict) else None,
                       "flight_id": flight.get("id") if isinstance(flight, dict) else None,
                       "start": flight.get("start") if isinstance(flight, dict) else None}
    checked: list[str] = []
    differences: list[str] = []
    for key, label in (("site", "site"), ("flight_id", "flight id"), ("start", "start time")):
        a, b = truth_side.get(key), result_side.get(key)
        if a is None or b is None:
            continue
        checked.append(key)
        same = (_when(a) == _when(b) and _when(a) is not None) if key == "start" else str(a) == str(b)
        if not same:
            differences.append(f"{label} {a!r} (truth) vs {b!r} (result)")
    if not checked:
        log.warning("%s / %s: no site, flight id or start time on both sides; cannot check that they "
                    "are of one flight", truth_path, summary_path)
    if differences and not force:
        raise MismatchError(f"{truth_path} and {result_dir} are of different flights: "
                            f"{'; '.join(differences)} (use --force to score them anyway)")
    return {"checked": checked, "differences": differences, "forced": bool(differences and force)}


def evaluate(truth_dir: str | PathLike[str], result_dir: str | PathLike[str],
             settings: Mapping[str, Any] | None = None, *, force: bool = False) -> dict[str, Any]:
    """Score a result folder against a simulated flight's truth.

    Parameters
    ----------
    truth_dir : path-like
        The simulated flight folder (holding ``truth.geojson``) or the truth file itself.
    result_dir : path-like
        The result folder of ``pvscan inspect`` (holding ``modules.geojson``).
    settings : mapping, optional
        The pipeline's ``[evaluate]`` section (default: ``load_pipeline()["evaluate"]``).
    force : bool
        Score a truth and a result of different flights anyway (see
        :func:`flight_identity_check`; the scores record it under ``flight_check``).

    Returns
    -------
    dict
        JSON-serialisable scores (see the module docstring); temperatures [degC], [K],
        powers [W].

    Raises
    ------
    SimulationError
        The truth is missing or invalid.
    OutputError
        The result's modules.geojson is missing or invalid.
    MismatchError
        Truth and result are of different flights (site, flight id or start time) and
        ``force`` is false.
    """
    truth_path = Path(truth_dir)
    if truth_path.is_dir() or truth_path.suffix.lower() not in (".geojson", ".json"):
        truth_path = truth_path / "truth.geojson"
    result_dir = Path(result_dir)
    truth = read_feature_collection(truth_path, SimulationError)
    tf = truth["features"]
    if not tf or "module_id" not in tf[0].get("properties", {}):
        raise SimulationError(f"{truth_path}: no module features with module_id")
    meta = truth.get("pvscan_truth", {})
    mods = read_feature_collection(result_dir / "modules.geojson", OutputError)
    identity = flight_identity_check(truth_path, meta if isinstance(meta, dict) else {}, result_dir, force)
    rf = mods["features"]
    if settings is None:
        from pvscan.io.settings import load_pipeline

        settings = load_pipeline()["evaluate"]
    summ = _read_summary(result_dir)
    lay = summ.get("layout")
    layout_detected = isinstance(lay, dict) and lay.get("source") == "detected"
    layout_scores = None
    if layout_detected:
        # the result's modules are where the ortho shows them (no drawing to place): matched by
        # position against the truth's modules in the ortho
        layout_scores, match = detected_match(truth_path.parent, tf, rf, float(settings.get("match_distance_m", 0.5)))
        how = "position in the ortho (layout detected)"
    else:
        match, how = _match(tf, rf, meta.get("epsg"), float(settings.get("min_id_match_fraction", 0.9)),
                            float(settings.get("match_distance_m", 0.5)))

    tp = [f["properties"] for f in tf]
    rp = [f.get("properties", {}) for f in rf]
    t_def = [_defect(p.get("defect")) for p in tp]
    p_def = [(_defect(rp[k].get("defect")) if k >= 0 else None) for k in match]

    # anomalies by module
    anom_by_module: dict[str, list[dict]] = {}
    anom_path = result_dir / "anomalies.geojson"
    n_anom = None
    if anom_path.exists():
        an = read_feature_collection(anom_path, OutputError)["features"]
        n_anom = len(an)
        for f in an:
            p = f.get("properties", {})
            ids = p.get("module_ids") or [p.get("module_id")]
            if isinstance(ids, str):
                try:
                    ids = json.loads(ids)
                except json.JSONDecodeError:
                    ids = [ids]
            for mid in ids:
                if mid is not None:
                    anom_by_module.setdefault(str(mid), []).append(p)
    res_id = [(str(rp[k].get("module_id")) if k >= 0 else None) for k in match]

    n = len(tf)
    t_bad = np.array([d is not None for d in t_def])
    p_bad = np.array([d is not None for d in p_def])
    matched = match >= 0
    TP = int((t_bad & p_bad).sum())
    FP = int((~t_bad & p_bad).sum())
    FN = int((t_bad & ~p_bad).sum())
    n_healthy = int((~t_bad).sum())
    precision = _ratio(TP, TP + FP)
    recall = _ratio(TP, TP + FN)
    f1 = None if not precision or not recall else 2 * precision * recall / (precision + recall)

    classes_t = sorted({d for d in t_def if d})
    classes_p = sorted({d for d in p_def if d})
    labels = sorted(set(classes_t) | set(classes_p)) + ["none"]
    confusion = {a: {b: 0 for b in labels} for a in labels}
    for a, b in zip(t_def, p_def):
        confusion[a or "none"][b or "none"] += 1
    per_class: dict[str, dict[str, Any]] = {}
    for c in sorted(set(classes_t) | set(classes_p)):
        n_true = sum(1 for d in t_def if d == c)
        n_pred = sum(1 for d in p_def if d == c)
        right = sum(1 for a, b in zip(t_def, p_def) if a == c and b == c)
        detected = sum(1 for a, b in zip(t_def, p_def) if a == c and b is not None)
        per_class[c] = {"n_true": n_true, "n_predicted": n_pred, "correct": right,
                        "recall": _f(_ratio(right, n_true)), "precision": _f(_ratio(right, n_pred)),
                        "detected_any_class": _f(_ratio(detected, n_true))}
    class_ok = sum(1 for a, b in zip(t_def, p_def) if a and a == b)
    fa_tags: dict[str, int] = {}
    for i in np.flatnonzero(~t_bad & p_bad).tolist():
        for tag in tp[i].get("distractors") or ["none"]:
            fa_tags[tag] = fa_tags.get(tag, 0) + 1

    # power loss
    t_loss = np.array([_num(p.get("power_loss_w")) for p in tp])
    p_loss = np.array([(_num(rp[k].get("power_loss_w")) if k >= 0 else math.nan) for k in match])
    t_loss = np.nan_to_num(t_loss)
    p_loss_z = np.nan_to_num(p_loss)
    total_t = float(t_loss.sum())
    total_p = float(sum(_num(p.get("power_loss_w")) for p in rp if np.isfinite(_num(p.get("power_loss_w")))))
    groups: dict[int, list[int]] = {}
    for i, p in enumerate(tp):
        if t_def[i] in LOSS_GROUP_KINDS and p.get("defect_group") is not None:
            groups.setdefault(int(p["defect_group"]), []).append(i)
    per_anomaly: list[dict[str, Any]] = []
    for _group, members in sorted(groups.items()):
        tl = float(t_loss[members].sum())
        pl = float(p_loss_z[members].sum())
        # found and named right: every module of the anomaly given the true class
        right = all(p_def[i] == t_def[i] for i in members)
        per_anomaly.append({"defect": t_def[members[0]], "module_id": tp[members[0]]["module_id"],
                            "n_modules": len(members), "true_w": _f(tl), "predicted_w": _f(pl),
                            "rel_error": _f((pl - tl) / tl if tl else None), "classified_right": right})
    # the classes whose loss follows from electrical rules or the thermal deficit, together:
    # truth over the injected modules of those classes, prediction over the modules the
    # result puts in those classes (a missed module counts as zero, a wrong one against)
    grp_t = float(sum(t_loss[i] for i in range(n) if t_def[i] in LOSS_GROUP_KINDS))
    grp_p = float(sum(_num(p.get("power_loss_w")) for p in rp
                      if _defect(p.get("defect")) in LOSS_GROUP_KINDS and np.isfinite(_num(p.get("power_loss_w")))))
    rel = [abs(a["rel_error"]) for a in per_anomaly if a["rel_error"] is not None]
    # the same over the anomalies found and named right: how good the loss rules are when
    # detection is (a missed anomaly counts as -100 % above, whatever the rule)
    rel_ok = [abs(a["rel_error"]) for a in per_anomaly if a["rel_error"] is not None and a["classified_right"]]
    loss_group = {"kinds": list(LOSS_GROUP_KINDS), "true_total_w": _f(grp_t), "predicted_total_w": _f(grp_p),
                  "ratio": _f(_ratio(grp_p, grp_t)), "n_anomalies": len(rel),
                  "share_within_25pct": _f(_ratio(sum(1 for r in rel if r <= 0.25), len(rel))),
                  "n_classified_right": len(rel_ok),
                  "share_within_25pct_classified_right": _f(_ratio(sum(1 for r in rel_ok if r <= 0.25),
                                                                   len(rel_ok)))}
    loss_by_kind: dict[str, dict[str, Any]] = {}
    for k in LOSS_GROUP_KINDS:
        mine = [a for a in per_anomaly if a["defect"] == k and a["rel_error"] is not None]
        if mine:
            errs = [abs(a["rel_error"]) for a in mine]
            loss_by_kind[k] = {"n": len(errs), "median_abs_rel_error": _f(np.median(errs)),
                               "n_within_25pct": sum(1 for e in errs if e <= 0.25),
                               "n_classified_right": sum(1 for a in mine if a["classified_right"]),
                               "n_within_25pct_classified_right": sum(
                                   1 for a in mine if a["classified_right"] and abs(a["rel_error"]) <= 0.25)}

    # temperatures
    t_true = np.array([_num(p.get("t_true_median_c")) for p in tp])
    t_meas = np.array([(_num(rp[k].get("t_median_c")) if k >= 0 else math.nan) for k in match])
    sel = ~t_bad & np.isfinite(t_true) & np.isfinite(t_meas)
    err = t_meas[sel] - t_true[sel]
    rmse = float(np.sqrt(np.mean(err ** 2))) if err.size else None
    bias = float(np.mean(err)) if err.size else None
    clean = sel & np.array([not p.get("distractors") for p in tp])
    err_c = t_meas[clean] - t_true[clean]
    rmse_clean = float(np.sqrt(np.mean(err_c ** 2))) if err_c.size else None

    dn_true = np.array([_num(p.get("delta_t_norm_k")) for p in tp])
    dn_pred = np.full(n, math.nan)
    for i in np.flatnonzero(t_bad & matched).tolist():
        cand = anom_by_module.get(res_id[i] or "", [])
        same = [a for a in cand if _defect(a.get("defect")) == t_def[i]] or cand
        if same:
            dn_pred[i] = _num(same[0].get("delta_t_norm_k"))
        else:
            dn_pred[i] = _num(rp[match[i]].get("delta_t_norm_k"))
    dsel = t_bad & np.isfinite(dn_pred) & np.isfinite(dn_true)
    dn_mae = float(np.median(np.abs(dn_pred[dsel] - dn_true[dsel]))) if dsel.any() else None
    dsel_found = dsel & p_bad
    dn_mae_found = (float(np.median(np.abs(dn_pred[dsel_found] - dn_true[dsel_found])))
                    if dsel_found.any() else None)

    # co-registration (none on a detected layout: nothing was drawn to place)
    reg = None
    if not layout_detected and "layout_offset_m" in meta:
        shift = summ.get("layout_shift_m")
        if isinstance(shift, (list, tuple)) and len(shift) == 2:
            off = meta["layout_offset_m"]
            ex, ey = float(shift[0]) + float(off[0]), float(shift[1]) + float(off[1])
            reg = {"truth_offset_m": off, "reported_shift_m": list(shift), "error_m": _f(math.hypot(ex, ey))}
    if reg is not None and (truth_path.parent / "truth_ortho.geojson").exists():
        placed = placement_error(truth_path.parent, tf, rf, match, summ.get("registration"), summ.get("layout_shift_m"))
        reg["placed_error_m"] = None if placed is None else {k: (_f(v) if k != "n" else v) for k, v in placed.items()}

    return {
        "truth": str(truth_path), "result": str(result_dir), "flight_check": identity, "matched_by": how,
        "n_modules": n, "n_matched": int(matched.sum()), "n_defective_true": int(t_bad.sum()),
        "n_defective_predicted": int(p_bad.sum()), "n_anomalies": n_anom,
        "module": {"true_positive": TP, "false_positive": FP, "false_negative": FN,
                   "precision": _f(precision), "recall": _f(recall), "f1": _f(f1),
                   "false_alarms_per_1000_healthy": _f(1000.0 * FP / n_healthy if n_healthy else None),
                   "class_accuracy_of_true_defects": _f(_ratio(class_ok, int(t_bad.sum()))),
                   "false_alarms_by_distractor": fa_tags},
        "per_class": per_class,
        "confusion": {"labels": labels, "matrix": confusion},
        "power_loss": {"true_total_w": _f(total_t), "predicted_total_w": _f(total_p),
                       "ratio": _f(_ratio(total_p, total_t)), "abs_error_w": _f(total_p - total_t),
                       "rel_error": _f((total_p - total_t) / total_t if total_t else None),
                       "group": loss_group, "per_kind": loss_by_kind, "per_anomaly": per_anomaly},
        "temperature": {"healthy_rmse_k": _f(rmse), "healthy_bias_k": _f(bias), "n_healthy": int(sel.sum()),
                        "healthy_rmse_no_distractor_k": _f(rmse_clean), "n_healthy_no_distractor": int(clean.sum()),
                        "delta_t_norm_median_abs_error_k": _f(dn_mae),
                        "delta_t_norm_median_abs_error_detected_k": _f(dn_mae_found),
                        "n_defective_scored": int(dsel.sum())},
        "registration": reg,
        "missed": _missed(tp, rp, match, t_def, p_bad, float(settings["faint_contrast"])),
        "detected_layout": (None if layout_scores is None else
                            {**layout_scores, **no_string_scores(t_def, p_def, match, rf)}),
    }


def _read_summary(result_dir: Path) -> dict[str, Any]:
    """The result's ``summary.json`` ({} when missing or unreadable)."""
    try:
        data = json.loads((result_dir / "summary.json").read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return {}
    return data if isinstance(data, dict) else {}


def _missed_lines(missed: Mapping[str, Any] | None) -> list[str]:
    """The terminal line on missed defects: how many rose less than ``faint_contrast`` times
    the healthy modules' measured spread."""
    if not missed or not missed.get("n_missed"):
        return []
    if missed.get("healthy_spread_k") is None:
        return [f"missed defects {missed['n_missed']} (no spread of healthy modules to read them against)"]
    return [f"missed defects {missed['n_missed']}: {missed['n_faint']} faint (true rise under "
            f"{missed['faint_contrast']:g} x the healthy spread of {missed['healthy_spread_k']:.2f} K), "
            f"{missed['n_missed'] - missed['n_faint']} clear"
            + ("" if missed.get("recall_clear") is None else
               f"; recall over the clear defects {missed['recall_clear']:.2f} "
               f"({missed['n_clear_found']} of {missed['n_clear_true']})")]


def format_report(scores: Mapping[str, Any]) -> str:
    """A plain-text table of the scores (for the terminal)."""
    def fmt(v: float | int | None, pct: bool = False) -> str:
        if v is None:
            return "-"
        return f"{100 * v:.1f} %" if pct else (f"{v:.3f}" if isinstance(v, float) else str(v))

    m, pl, t = scores["module"], scores["power_loss"], scores["temperature"]
    lines = [f"truth  {scores['truth']}", f"result {scores['result']} (matched {scores['n_matched']}/"
             f"{scores['n_modules']} by {scores['matched_by']})", "",
             *([f"DIFFERENT FLIGHTS (scored with --force): {'; '.join(scores['flight_check']['differences'])}", ""]
               if (scores.get("flight_check") or {}).get("forced") else []),
             f"defective modules  true {scores['n_defective_true']}  predicted {scores['n_defective_predicted']}",
             f"precision {fmt(m['precision'], True)}   recall {fmt(m['recall'], True)}   F1 {fmt(m['f1'])}",
             f"false alarms per 1,000 healthy modules  {fmt(m['false_alarms_per_1000_healthy'])}"
             + ("  (at distractors: "
                + ", ".join(f"{k} {v}" for k, v in sorted(m["false_alarms_by_distractor"].items())) + ")"
                if m.get("false_alarms_by_distractor") else ""),
             *_missed_lines(scores.get("missed")), "",
             f"{'class':<26}{'true':>6}{'pred':>6}{'right':>7}{'recall':>9}{'precision':>11}"]
    for c, v in scores["per_class"].items():
        lines.append(f"{c:<26}{v['n_true']:>6}{v['n_predicted']:>6}{v['correct']:>7}"
                     f"{fmt(v['recall'], True):>9}{fmt(v['precision'], True):>11}")
    labels = scores["confusion"]["labels"]
    short = ["".join(w[0] for w in lab.split("_")) if lab != "none" else "none" for lab in labels]
    legend = ", ".join(f"{s_}={lab}" for s_, lab in zip(short, labels) if lab != "none")
    lines += ["", "confusion (rows truth, columns predicted)", f"  ({legend})",
              " " * 26 + "".join(f"{s_:>6}" for s_ in short)]
    for a in labels:
        row = scores["confusion"]["matrix"][a]
        lines.append(f"{a:<26}" + "".join(f"{row[b]:>6}" for b in labels))
    lines += ["", f"power loss at STC  true {fmt(pl['true_total_w'])} W  predicted {fmt(pl['predicted_total_w'])} W"
              f"  ratio {fmt(pl['ratio'])}  error {fmt(pl['rel_error'], True)}"]
    g = pl.get("group")
    if g:
        lines.append(f"  {' + '.join(g['kinds'])}:")
        lines.append(f"    true {fmt(g['true_total_w'])} W  predicted {fmt(g['predicted_total_w'])} W"
                     f"  ratio {fmt(g['ratio'])}; {fmt(g['share_within_25pct'], True)} of {g['n_anomalies']}"
                     " anomalies within 25 %")
        if g.get("n_classified_right") is not None:
            lines.append(f"    of the {g['n_classified_right']} found and named right:"
                         f" {fmt(g['share_within_25pct_classified_right'], True)} within 25 %")
    for k, v in pl["per_kind"].items():
        lines.append(f"  {k:<26} n={v['n']:<3} median |rel. error| {fmt(v['median_abs_rel_error'], True)}"
                     + (f"  within 25 %: {v['n_within_25pct']}/{v['n']}"
                        f" ({v['n_within_25pct_classified_right']}/{v['n_classified_right']} found and named right)"
                        if "n_within_25pct" in v else ""))
    lines += ["", f"healthy modules: temperature RMSE {fmt(t['healthy_rmse_k'])} K, bias {fmt(t['healthy_bias_k'])} K"
              f" (RMSE {fmt(t.get('healthy_rmse_no_distractor_k'))} K away from distractors)",
              f"defective modules: median |error| of delta_t_norm_k {fmt(t['delta_t_norm_median_abs_error_k'])} K"]
    dl = scores.get("detected_layout")
    if dl:
        ce = dl.get("corner_error_m") or {}
        ns = dl["no_string_classes"]
        lines += [f"layout detected in the ortho: found {dl['found']}/{dl['truth_modules']} modules "
                  f"({fmt(dl['found_fraction'], True)}), extra {dl['extra']}, corner error median "
                  f"{fmt(ce.get('median'))} m, p95 {fmt(ce.get('p95'))} m",
                  f"  classes without string ids (not {', '.join(ns['excluded'])}): recall {fmt(ns['recall'], True)}"
                  f"  precision {fmt(ns['precision'], True)}  named right {fmt(ns['class_right'], True)}"
                  f" of {ns['n_true']}"]
    if scores.get("registration"):
        r = scores["registration"]
        lines.append(f"layout shift: reported {r['reported_shift_m']} m for an offset of {r['truth_offset_m']} m"
                     f" (error {fmt(r['error_m'])} m)")
        pe = r.get("placed_error_m")
        if pe:
            lines.append(f"footprints placed from the modules in the ortho: median {fmt(pe['median_m'])} m, "
                         f"p95 {fmt(pe['p95_m'])} m, largest {fmt(pe['max_m'])} m ({pe['n']} modules)")
    return "\n".join(lines)
