"""Local refinement of a placed layout: one small translation per table.

After the global fit (shift, rotation, scale) photogrammetry leaves local, non-rigid
distortions of a few centimetres to decimetres: a table can sit a little off where the
similarity puts it. :func:`refine_tables` measures, for each table, the translation within
``local_radius_m`` that minimises the module evidence of its own modules
(:mod:`pvscan.measure.register.evidence`), and keeps it only when

1. it lowers that table's evidence by ``local_gate`` (else the table keeps the global fit);
2. it moves the table at least ``local_min_m`` (smaller corrections are noise of the
   evidence minimum, not worth a move);
3. it agrees with its neighbours: the median correction of the ``local_neighbours`` nearest
   tables (refined or not) is within ``local_reject_m`` of it. Distortion of an
   orthomosaic varies smoothly over a site; a table that disagrees with all around it may
   have found a defect, a shadow or a seam, not its place: it keeps its own correction only
   when its modules prefer it to the neighbours' by ``local_gate`` again, takes the
   neighbours' when that helps it, and is otherwise rejected (kept at the global fit);
4. the site as a whole is better for it: the mean evidence of all sampled modules with the
   corrections is lower by ``local_site_gate`` than without (else nothing is applied).

The result says how many tables were refined and rejected, the corrections' root mean
square and largest length (the local residuals of the global fit) and the evidence before
and after.

:func:`refine_rows` does the same one level down, after the tables: each row of modules of a
table (``table_row``) gets its own translation within ``local_row_radius_m``, held by the
nearest rows (of its own table and of the tables around it) under the same gates. Relief
displaces one row of a raised table against the other in an ortho built on a surface below
the glass (the upper row of a tilted table stands higher); one translation per table cannot
follow that.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

from pvscan.measure.register.evidence import (
    ModuleSample,
    Placement,
    evidence,
    module_spread,
    sample_modules,
)
from pvscan.measure.register.search import FINEST_STEP_SHARE, group_evidence, refine_translations

__all__ = ["LocalFit", "refine_tables", "refine_rows", "table_offsets", "row_offsets", "check_reach", "take_modules"]

#: Separator of a row's key ``table_id`` + SEP + ``table_row`` (a character no id holds).
_SEP = "\x1f"


@dataclass
class LocalFit:
    """Per-table corrections after the global fit.

    Attributes
    ----------
    shifts : dict
        ``table_id -> (dx, dy)`` applied after the global placement [m] (refined tables only).
    tables : list of dict
        Every table measured: ``table_id``, ``dx_m``, ``dy_m`` (what its own modules
        preferred), ``evidence_before``, ``evidence_after`` [-], ``status`` (``refined``,
        ``kept``: no better than the global fit, ``neighbours``: took its neighbours' median
        correction, ``rejected``: disagreed with its neighbours and kept the global fit).
    evidence_before, evidence_after : float
        Mean evidence of all sampled modules without and with the corrections [-].
    applied : bool
    message : str
    """

    shifts: dict = field(default_factory=dict)
    tables: list = field(default_factory=list)
    evidence_before: float = float("nan")
    evidence_after: float = float("nan")
    applied: bool = False
    message: str = ""
    what: str = "table"

    def summary(self) -> dict:
        """Plain-JSON record: counts, residuals, evidence, message (``tables_*`` keys, or
        ``rows_*`` for the rows of :func:`refine_rows`)."""
        d = np.array([math.hypot(*v) for v in self.shifts.values()]) if self.shifts else np.zeros(0)
        w = self.what
        return {
            "applied": bool(self.applied),
            f"{w}s_measured": len(self.tables),
            f"{w}s_refined": len(self.shifts) if self.applied else 0,
            f"{w}s_from_neighbours": int(sum(t["status"] == "neighbours" for t in self.tables)) if self.applied else 0,
            f"{w}s_rejected": int(sum(t["status"] == "rejected" for t in self.tables)),
            "residual_rms_m": round(float(np.sqrt(np.mean(d ** 2))), 4) if len(d) and self.applied else 0.0,
            "residual_max_m": round(float(d.max()), 4) if len(d) and self.applied else 0.0,
            "evidence_before": _r(self.evidence_before),
            "evidence_after": _r(self.evidence_after),
            "message": self.message,
        }

    def table_records(self) -> list[dict]:
        """The applied corrections as ``{table_id, dx_m, dy_m}`` (the report draws them), with
        ``table_row`` for rows."""
        if not self.applied:
            return []
        out = []
        for k, v in self.shifts.items():
            rec: dict[str, Any] = {"table_id": str(k)}
            if self.what == "row":
                t, r = str(k).split(_SEP, 1)
                rec = {"table_id": t, "table_row": int(r) if r.lstrip("-").isdigit() else r}
            out.append({**rec, "dx_m": round(float(v[0]), 4), "dy_m": round(float(v[1]), 4)})
        return out


def _r(v: float) -> float | None:
    return round(float(v), 4) if math.isfinite(v) else None


def take_modules(sample: ModuleSample, sel: np.ndarray) -> ModuleSample:
    """The sampled modules ``sel`` (boolean or index array) as a sample of their own."""
    assert sample.centred is not None
    centred = sample.centred[sel]
    # values and centred are one array in a sample read by sample_modules: one copy serves both
    values = centred if sample.values is sample.centred else sample.values[sel]
    return ModuleSample(index=sample.index[sel], values=values, x0=sample.x0[sel], y0=sample.y0[sel],
                        gx=sample.gx, gy=sample.gy, frames=sample.frames[sel], table=sample.table[sel],
                        centred=centred, ref=sample.ref[sel])


def _groups(keys: np.ndarray) -> dict[str, np.ndarray]:
    """Ascending positions of each distinct key, in order of first appearance (one sort,
    not one comparison of every key per group)."""
    if len(keys) == 0:
        return {}
    order = np.argsort(keys, kind="stable")
    ks = keys[order]
    cut = np.flatnonzero(ks[1:] != ks[:-1]) + 1
    runs = np.split(order, cut)
    firsts = [int(r[0]) for r in runs]
    return {str(keys[f]): runs[i] for i, f in sorted(enumerate(firsts), key=lambda t: t[1])}


def _per_table(modules: gpd.GeoDataFrame, n: int, keys: np.ndarray | None = None) -> np.ndarray:
    """Rows of up to ``n`` modules of every table (or of every group of ``keys``), spread
    along it (deterministic)."""
    tid = modules["table_id"].astype(str).to_numpy() if keys is None else keys
    order = np.lexsort((modules["table_col"].to_numpy() if "table_col" in modules.columns else np.zeros(len(tid)),
                        modules["table_row"].to_numpy() if "table_row" in modules.columns else np.zeros(len(tid)),
                        tid))
    out = []
    start = 0
    ts = tid[order]
    while start < len(order):
        stop = start
        while stop < len(order) and ts[stop] == ts[start]:
            stop += 1
        rows = order[start:stop]
        if len(rows) > n:
            rows = rows[np.unique(np.linspace(0, len(rows) - 1, n).round().astype(int))]
        out.extend(rows.tolist())
        start = stop
    return np.sort(np.asarray(out, dtype=np.int64))


def check_reach(reg: Any, cfg: Mapping[str, Any]) -> None:
    """A registration (:class:`pvscan.measure.register.Registration`) whose applied table
    correction reached the edge of the search (``local_radius_m`` east or north, within the
    search's finest step, ``local_step_m`` x ``search.FINEST_STEP_SHARE``) is made ``ambiguous``: the table may belong
    farther, the global fit is off there by more than the table refinement can follow, and its
    footprints may straddle its modules. ``reg.evidence["local_reach"]`` records the count."""
    lf = reg.local
    if lf is None or not lf.applied or not lf.shifts:
        return
    radius = float(cfg["local_radius_m"])
    edge = radius - float(cfg["local_step_m"]) * FINEST_STEP_SHARE
    at = {str(t): (float(d[0]), float(d[1])) for t, d in lf.shifts.items() if max(abs(d[0]), abs(d[1])) >= edge}
    reg.evidence["local_reach"] = {"tables_at_edge": len(at), "radius_m": radius}
    if not at:
        return
    t, d = max(at.items(), key=lambda kv: max(abs(kv[1][0]), abs(kv[1][1])))
    reg.status = "ambiguous"
    reg.message += (f"; {len(at)} of {len(lf.shifts)} corrected tables at the edge of the local search (table {t}: "
                    f"({d[0]:+.3f}, {d[1]:+.3f}) m, at most {radius:g} m east and north): the global fit is off "
                    "there by more than the table refinement can follow, findings may sit beside their modules")


def table_offsets(modules: gpd.GeoDataFrame, shifts: Mapping[Any, Any]) -> np.ndarray:
    """(n, 2) per-module translations of ``shifts`` (``table_id -> (dx, dy)``) [m]."""
    out = np.zeros((len(modules), 2))
    if not shifts or "table_id" not in modules.columns:
        return out
    tid = modules["table_id"].astype(str).to_numpy()
    vals = {str(k): (float(v[0]), float(v[1])) for k, v in shifts.items()}
    # one lookup per module (a later key equal as a string wins, as it did key by key)
    hit = np.array([t in vals for t in tid], dtype=bool) if len(tid) else np.zeros(0, bool)
    if hit.any():
        out[hit] = [vals[t] for t in tid[hit]]
    return out


def row_keys(modules: gpd.GeoDataFrame) -> np.ndarray:
    """The key of each module's table row: ``table_id`` and ``table_row`` joined."""
    return np.char.add(np.char.add(modules["table_id"].astype(str).to_numpy().astype(str), _SEP),
                       modules["table_row"].astype(str).to_numpy().astype(str)).astype(object)


def row_offsets(modules: gpd.GeoDataFrame, rows: Any) -> np.ndarray:
    """(n, 2) per-module translations of ``rows`` (``(table_id, table_row, dx, dy)``) [m]."""
    if not rows or not {"table_id", "table_row"} <= set(modules.columns):
        return np.zeros((len(modules), 2))
    shifts = {f"{t}{_SEP}{r}": (dx, dy) for t, r, dx, dy in rows}
    out = np.zeros((len(modules), 2))
    keys = row_keys(modules)
    hit = np.array([k in shifts for k in keys], dtype=bool) if len(keys) else np.zeros(0, bool)
    if hit.any():
        out[hit] = [shifts[k] for k in keys[hit]]
    return out


def refine_tables(orthos: Any, modules: gpd.GeoDataFrame, cfg: Mapping[str, Any]) -> LocalFit:
    """Per-table translations of placed ``modules`` (see the module docstring).

    Parameters
    ----------
    orthos : OrthoSet
    modules : geopandas.GeoDataFrame
        Module footprints with frames and ``table_id``, already placed by the global fit
        (ortho CRS) [m].
    cfg : mapping
        The ``[register]`` section: ``local_*`` keys and the evidence keys.
    """
    if "table_id" not in modules.columns or len(modules) == 0:
        return LocalFit(message="no table ids: no local refinement")
    return _refine_groups(orthos, modules, cfg, None, float(cfg["local_radius_m"]),
                          int(cfg["local_modules_per_table"]), float(cfg["local_min_m"]), "table")


def refine_rows(orthos: Any, modules: gpd.GeoDataFrame, cfg: Mapping[str, Any]) -> LocalFit:
    """Per-row translations (each ``table_row`` of each table) of placed ``modules``, within
    ``local_row_radius_m``, under the gates of :func:`refine_tables` (see the module
    docstring). ``modules`` are placed with their table corrections already."""
    if not {"table_id", "table_row"} <= set(modules.columns) or len(modules) == 0:
        return LocalFit(message="no table rows: no row refinement", what="row")
    keys = row_keys(modules)
    if len(np.unique(keys)) == len(np.unique(modules["table_id"].astype(str).to_numpy())):
        return LocalFit(message="one row per table: no row refinement", what="row")
    return _refine_groups(orthos, modules, cfg, keys, float(cfg["local_row_radius_m"]),
                          int(cfg["local_modules_per_row"]), float(cfg["local_row_min_m"]), "row")


def _refine_groups(orthos: Any, modules: gpd.GeoDataFrame, cfg: Mapping[str, Any], keys: np.ndarray | None,
                   radius: float, per_group: int, min_m: float, what: str) -> LocalFit:
    """One translation per table (``keys`` None) or per group of ``keys`` (see the module
    docstring)."""
    rows = _per_table(modules, per_group, keys)
    sub_mods = modules.iloc[rows]
    sample = sample_modules(orthos, sub_mods, n=len(sub_mods), margin_m=radius + float(cfg["evidence_band_m"]) + 0.05,
                            reduce=1, seed=0)
    if len(sample) == 0:
        return LocalFit(message=f"no {what} could be sampled: no local refinement", what=what)
    b = modules.total_bounds
    ident = Placement(cx=float((b[0] + b[2]) / 2.0), cy=float((b[1] + b[3]) / 2.0))
    # the plain spread inside nearly whole footprints: its minimum is where the modules are
    # (the outline contrast would pull a table toward the strongest edge beside it)
    inset = float(cfg["evidence_fine_inset"])
    sub_cfg = {**cfg, "evidence_inset": inset, "evidence_band_m": None, "evidence_step_m": float(cfg["local_step_m"]),
               "max_shift_m": radius}
    # the group of each sampled module (sample.index: positions in sub_mods)
    tables = sample.table.astype(str) if keys is None else keys[rows][sample.index].astype(str)
    # the sampled modules of each table (positions ascending), tables in order of appearance;
    # each table's pixels are taken when needed, not all copied at once
    groups = _groups(tables)
    fr = sample.frames
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    recs: list[dict[str, Any]] = []
    # every table's search at once (each on its own modules, the path it takes alone)
    sels = list(groups.values())
    e0s = group_evidence(sample, ident, sels, sub_cfg)
    found = refine_translations(sample, sels, ident, sub_cfg, start_evidence=e0s)
    for t, sel, e0, (p, e1) in zip(groups, sels, e0s, found):
        recs.append({"table_id": t, "dx_m": float(p.tx), "dy_m": float(p.ty), "evidence_before": e0,
                     "evidence_after": e1, "x": float(np.mean(cx[sel])), "y": float(np.mean(cy[sel]))})
    gate = float(cfg["local_gate"])
    for r in recs:
        better = math.isfinite(r["evidence_after"]) and r["evidence_after"] < (1.0 - gate) * r["evidence_before"]
        r["status"] = "refined" if (better and math.hypot(r["dx_m"], r["dy_m"]) >= min_m) else "kept"
    # neighbours hold each table: its correction must agree with theirs
    k = int(cfg["local_neighbours"])
    reject = float(cfg["local_reject_m"])
    if len(recs) > k >= 1:
        xy = np.array([[r["x"], r["y"]] for r in recs])
        d = np.array([[r["dx_m"], r["dy_m"]] if r["status"] == "refined" else [0.0, 0.0] for r in recs])
        for i, r in enumerate(recs):
            if r["status"] != "refined":
                continue
            dist = np.hypot(xy[:, 0] - xy[i, 0], xy[:, 1] - xy[i, 1])
            dist[i] = np.inf
            nb = np.argsort(dist)[:k]
            med = np.median(d[nb], axis=0)
            if math.hypot(*(d[i] - med)) <= reject:
                continue
            # an outlier: kept only when its own modules decisively prefer it to what its
            # neighbours say; else it takes the neighbours' correction if that helps it
            at_nb = ident.moved(tx=float(med[0]), ty=float(med[1]))
            e_nb = evidence(module_spread(take_modules(sample, groups[r["table_id"]]), at_nb, inset_u=inset,
                                          inset_v=inset))
            if math.isfinite(e_nb) and r["evidence_after"] < (1.0 - gate) * e_nb:
                continue
            if math.isfinite(e_nb) and e_nb < (1.0 - gate) * r["evidence_before"] and math.hypot(*med) >= min_m:
                r.update(dx_m=float(med[0]), dy_m=float(med[1]), evidence_after=e_nb, status="neighbours")
            else:
                r["status"] = "rejected"
    shifts = {r["table_id"]: (r["dx_m"], r["dy_m"]) for r in recs if r["status"] in ("refined", "neighbours")}
    local = np.array([shifts.get(t, (0.0, 0.0)) for t in tables], float)
    e_before = evidence(module_spread(sample, ident, inset_u=inset, inset_v=inset))
    e_after = evidence(module_spread(sample, ident, local=local, inset_u=inset, inset_v=inset)) if shifts else e_before
    site_gate = float(cfg["local_site_gate"])
    applied = bool(shifts) and math.isfinite(e_after) and e_after < (1.0 - site_gate) * e_before
    out_recs = [{k2: (round(v, 4) if isinstance(v, float) and math.isfinite(v) else v) for k2, v in r.items()
                 if k2 not in ("x", "y")} for r in recs]
    n_ref = len(shifts)
    n_rej = sum(r["status"] == "rejected" for r in recs)
    if applied:
        msg = (f"{n_ref} of {len(recs)} {what}s refined locally ({n_rej} rejected by their neighbours): "
               f"evidence {e_before:.3f} -> {e_after:.3f}")
    elif shifts:
        msg = (f"local refinement of {n_ref} {what}s not used: evidence {e_before:.3f} -> {e_after:.3f} "
               f"(needs {site_gate:.0%} lower)")
    else:
        msg = f"no {what} is better placed by a local correction ({n_rej} rejected by their neighbours)"
    return LocalFit(shifts=shifts if applied else {}, tables=out_recs, evidence_before=e_before,
                    evidence_after=e_after, applied=applied, message=msg, what=what)
