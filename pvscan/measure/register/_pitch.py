"""Pitches of the layout's rows: the vectors one module along a table row and one table
across the rows, which the one-pitch ambiguity of periodic rows is tested against [m]; and
that test (:func:`_resolve_pitch`: the placement used against the same placement one module
pitch along and across the rows, decided on module evidence, the table ends and the block
correlation; an undecided placement gives way to an alternative that passes in its own right)."""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np

from pvscan.measure.register._place import _largest_gap, _use_placement, apply_placement
from pvscan.measure.register._records import Registration, _num
from pvscan.measure.register.ends import glass_decides, judge_ends, pitch_steps
from pvscan.measure.register.evidence import (
    ModuleSample,
    Placement,
    _compose,
    _inverse,
    placement_quality,
    sample_modules,
)
from pvscan.measure.register.search import refine_placement

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

__all__ = ["_pitches", "_row_pitch", "_placement_of", "_turned", "_across", "_pitch_m", "_screen_turned", "_distinct",
           "_resolve_pitch", "_sample_at", "_judge"]


def _pitches(modules: gpd.GeoDataFrame) -> list[np.ndarray]:
    """Median vectors from a module to its next neighbour along a table row and across it [m]."""
    return list(_named_pitches(modules).values())


def _named_pitches(modules: gpd.GeoDataFrame) -> dict[str, np.ndarray]:
    """:func:`_pitches` by direction: ``along`` a table row, ``across`` it (the names of
    :func:`pvscan.measure.register.ends.end_lines`), each when the tables have one [m]."""
    import pandas as pd

    need = {"table_id", "table_row", "table_col", "fx0", "fy0", "fux", "fuy", "fvx", "fvy"}
    if not need <= set(modules.columns):
        return {}
    cx = modules["fx0"].to_numpy(float) + 0.5 * (modules["fux"].to_numpy(float) + modules["fvx"].to_numpy(float))
    cy = modules["fy0"].to_numpy(float) + 0.5 * (modules["fuy"].to_numpy(float) + modules["fvy"].to_numpy(float))
    df = pd.DataFrame({"t": modules["table_id"].astype(str).to_numpy(), "r": modules["table_row"].to_numpy(),
                       "c": modules["table_col"].to_numpy(), "x": cx, "y": cy})
    out = {}
    for name, key, step in (("along", "r", "c"), ("across", "c", "r")):
        d = df.sort_values(["t", key, step])
        same = (d["t"].to_numpy()[1:] == d["t"].to_numpy()[:-1]) & (d[key].to_numpy()[1:] == d[key].to_numpy()[:-1]) & (
            np.diff(d[step].to_numpy()) == 1)
        if same.any():
            dx = np.diff(d["x"].to_numpy())[same]
            dy = np.diff(d["y"].to_numpy())[same]
            v = np.array([np.median(dx), np.median(dy)])
            if np.all(np.isfinite(v)) and np.hypot(*v) > 0:
                out[name] = v
    return out


def _row_pitch(modules: gpd.GeoDataFrame, along: np.ndarray | None) -> np.ndarray | None:
    """Median vector from a table to the next table across the rows (the row pitch) [m].

    ``along`` is the vector between neighbouring modules along a table row. For each table
    the nearest other table whose centre lies across the rows (its offset along the row
    shorter than half the longer table) gives one vector; the median of those pointing one
    way is the pitch. None when the site has one row of tables."""
    if along is None or "table_id" not in modules.columns or len(modules) == 0:
        return None
    a = np.asarray(along, float)
    a = a / max(float(np.hypot(*a)), 1e-12)
    n = np.array([-a[1], a[0]])
    fr = modules[["fx0", "fy0", "fux", "fuy", "fvx", "fvy"]].to_numpy(float)
    cx = fr[:, 0] + 0.5 * (fr[:, 2] + fr[:, 4])
    cy = fr[:, 1] + 0.5 * (fr[:, 3] + fr[:, 5])
    tid = modules["table_id"].astype(str).to_numpy()
    names, inv = np.unique(tid, return_inverse=True)
    if len(names) < 2:
        return None
    cnt = np.bincount(inv).astype(float)
    tx = np.bincount(inv, cx) / cnt
    ty = np.bincount(inv, cy) / cnt
    s_al = (cx - tx[inv]) * a[0] + (cy - ty[inv]) * a[1]
    half = np.zeros(len(names))
    np.maximum.at(half, inv, np.abs(s_al))
    vecs = []
    for i in range(len(names)):
        dx, dy = tx - tx[i], ty - ty[i]
        d_al = dx * a[0] + dy * a[1]
        d_n = dx * n[0] + dy * n[1]
        ok = (np.abs(d_al) < np.maximum(half, half[i])) & (d_n > 0.3)
        if ok.any():
            j = int(np.argmin(np.where(ok, d_n, np.inf)))
            vecs.append((dx[j], dy[j]))
    if not vecs:
        return None
    v = np.median(np.asarray(vecs), axis=0)
    return v if np.all(np.isfinite(v)) and np.hypot(*v) > 0.3 else None


def _placement_of(q: Mapping[str, Any], centre: tuple[float, float]) -> Placement:
    """The placement of a judged proposal's record (shift [m], rotation [deg], scale)."""
    return Placement(float(q["shift_m"][0]), float(q["shift_m"][1]), float(q["rotation_deg"]), float(q["scale"]),
                     centre[0], centre[1])


def _turned(modules: gpd.GeoDataFrame, starts: list[Placement], cfg: Mapping[str, Any]) -> list[Placement]:
    """Each start turned by whole steps either way within ``max_rotation_deg`` [deg]: the step
    moves the module farthest from the centre by ``retry_turn_fraction`` of the modules' shorter
    side (the reach of the fit from a start), nearest turns first."""
    if not starts or len(modules) == 0:
        return []
    fr = modules[["fux", "fuy", "fvx", "fvy"]].to_numpy(float)
    side = float(np.nanmedian(np.minimum(np.hypot(fr[:, 0], fr[:, 1]), np.hypot(fr[:, 2], fr[:, 3]))))
    b = modules.total_bounds
    reach = 0.5 * float(np.hypot(b[2] - b[0], b[3] - b[1]))
    if not (math.isfinite(side) and reach > 0):
        return []
    step = math.degrees(float(cfg["retry_turn_fraction"]) * side / reach)
    lim = float(cfg["max_rotation_deg"])
    out = []
    for k in range(1, int(lim // step) + 1 if step > 0 else 1):
        for p in starts:
            for sgn in (1.0, -1.0):
                th = p.theta_deg + sgn * k * step
                if abs(th) <= lim:
                    out.append(p.moved(theta_deg=th))
    return out


def _across(modules: gpd.GeoDataFrame, starts: list[Placement], lim_m: float,
            sun: tuple[float, ...] | None = None) -> list[Placement]:
    """Each start moved across the table rows by one to as many module pitches as a table has
    rows of modules, toward the sun (either way when ``sun`` is not known), nearest first;
    shifts beyond ``lim_m`` [m] left out.

    A raised table's shadow beside it, away from the sun, can be about as wide as the table
    and carry the table's outline (ground, shadow and glass at three levels): the block
    correlation of edges then matches the table's outline to its shadow's, whole module widths
    across the rows away from the sun."""
    across = _named_pitches(modules).get("across")
    if across is None or not starts or "table_row" not in modules.columns:
        return []
    rows = modules.groupby(modules["table_id"].astype(str))["table_row"].nunique()
    n = int(rows.max()) if len(rows) else 0
    toward = float(np.dot(across, np.asarray(sun[:2], float))) if sun is not None else 0.0
    signs = (1.0, -1.0) if toward == 0.0 else (math.copysign(1.0, toward),)
    out = []
    for k in range(1, n + 1):
        for p in starts:
            for sgn in signs:
                tx, ty = p.tx + sgn * k * float(across[0]), p.ty + sgn * k * float(across[1])
                if math.hypot(tx, ty) <= lim_m:
                    out.append(p.moved(tx=tx, ty=ty))
    return out


def _pitch_m(modules: gpd.GeoDataFrame, direction: str) -> float:
    """Length of the module pitch ``along`` or ``across`` the table rows [m] (NaN: none)."""
    v = _named_pitches(modules).get(direction)
    return float(np.hypot(*v)) if v is not None else float("nan")


def _distinct(proposals: list[Placement], bounds: Any, tol_m: float) -> list[Placement]:
    """Proposals less any that moves no footprint more than ``tol_m`` from an earlier one [m]
    (``[register] distinct_tol_m``)."""
    out: list[Placement] = []
    for p in proposals:
        if all(_compose(p, _inverse(q)).displacement_max(bounds) > tol_m for q in out):
            out.append(p)
    return out


def _screen_turned(starts: list[Placement], cfg: Mapping[str, Any],
                   sample_at: Callable[[Placement], Any]) -> list[Placement]:
    """``starts`` ordered by a cheap first look, the most promising first (ties: given order).

    Each start is read by ``sample_at`` (the decimated grid of the coarse fit, around the
    start), moved by translation only (first inset, no re-read) and scored by its module
    evidence: a turn near the truth puts the far modules' cores on glass, a wrong one half a
    module off. Fitting a start in full costs tens of evidence evaluations on several reads;
    this look costs one read."""
    if len(starts) < 2:
        return list(starts)
    sub = {**cfg, "evidence_inset": float(cfg["evidence_insets"][0])}
    scores = []
    for p in starts:
        _, e = refine_placement(sample_at(p), Placement(cx=p.cx, cy=p.cy), sub, rotate=False, scale=False)
        scores.append(e if math.isfinite(e) else float("inf"))
    return [starts[i] for i in sorted(range(len(starts)), key=lambda i: (scores[i], i))]


def _sample_at(orthos: Any, modules: gpd.GeoDataFrame, placement: Placement | None, cfg: Mapping[str, Any],
               reduce: int = 1) -> ModuleSample:
    moved = apply_placement(modules, placement) if placement is not None else modules
    return sample_modules(orthos, moved, n=int(cfg["evidence_modules"]), margin_m=float(cfg["evidence_margin_m"]),
                          reduce=reduce, seed=0)


def _judge(sample: ModuleSample, placement: Placement, cfg: Mapping[str, Any], sun: tuple[float, ...] | None,
           expected_c: float | None = None) -> dict[str, Any]:
    q = placement_quality(sample, placement, cfg, sun=sun, expected_c=expected_c)
    return {k: (round(float(v), 4) if isinstance(v, float) and math.isfinite(v) else v) for k, v in q.items()}


@dataclass
class _Verdict:
    """The one-pitch tests of one placement (:func:`_pitch_verdict`)."""

    low: float
    decisive: bool
    ends: dict[str, Any]
    confirmed: bool
    both: bool
    by_glass: bool
    by_corr: bool
    against: bool
    gap: float
    gap_pitch: float
    corr_conf: float

    @property
    def ambiguous(self) -> bool:
        """Whether the placement fails the one-pitch decision (findings may sit on the
        neighbouring module)."""
        if not self.decisive and not self.confirmed and self.by_corr and self.ends["decisive"]:
            return False
        if self.against and not self.confirmed:
            return True
        if self.both or self.by_glass:
            return False
        return not (self.decisive or self.confirmed) or not self.ends["decisive"]

    def votes(self) -> dict[str, Any]:
        """The lowest evidence ratio one pitch away, table-end and glass votes (``evidence.pitch.switch``)."""
        return {"lowest_ratio": round(self.low, 4) if math.isfinite(self.low) else None,
                "ends_lowest": self.ends.get("lowest"), "glass_lowest": (self.ends.get("glass") or {}).get("lowest")}

    def record(self, cfg: Mapping[str, Any]) -> dict[str, Any]:
        """The decision as ``evidence.pitch`` (summary.json) records it."""
        low, gap, gp = self.low, self.gap, self.gap_pitch
        return {"lowest_ratio": round(low, 4) if math.isfinite(low) else None,
                "limit": round(1.0 + float(cfg["pitch_min_margin"]), 4), "decisive": bool(self.decisive),
                "ends": self.ends, "ends_confirm": bool(self.confirmed and not self.decisive),
                "both_lean": bool(self.both), "glass_ends": bool(self.by_glass),
                "correlation": {"confidence": round(self.corr_conf, 3),
                                "gap_m": round(gap, 4) if math.isfinite(gap) else None,
                                "pitch_gap_m": round(gp, 4) if math.isfinite(gp) else None,
                                "against": bool(self.against),
                                "confirms": bool(self.by_corr and not self.decisive and not self.confirmed
                                                 and self.ends["decisive"])}}

    def message(self, cfg: Mapping[str, Any]) -> str:
        """What the decision adds to the registration's message (empty when nothing needs saying)."""
        low, e_low = self.low, self.ends.get("lowest")
        almost = f"; a placement one module pitch away fits almost as well on the modules (evidence ratio {low:.2f})"
        if not self.decisive and not self.confirmed and self.by_corr and self.ends["decisive"]:
            return (f"{almost}, but the block correlation (confidence {self.corr_conf:.2f}, table outlines and "
                    f"ends) puts the layout within {self.gap:.3f} m of it")
        if self.against and not self.confirmed:
            return (f"; the block correlation (confidence {self.corr_conf:.2f}) puts the layout one module pitch "
                    f"from this placement (within {self.gap_pitch:.3f} m) and the table ends do not confirm it "
                    f"(median vote {_num(e_low):.2f}, {float(cfg['ends_confirm_vote']):g} needed): "
                    "findings may sit on the neighbouring module")
        if self.both:
            return (f"{almost}, but every one fits worse and no table end prefers it (lowest median vote "
                    f"{_num(e_low):.2f}, at least {float(cfg['ends_support_vote']):g})")
        if self.by_glass:
            return (f"{almost}, but only this one has glass in the end modules of the lines and none beyond "
                    f"their sunlit ends (lowest median glass vote {_num(self.ends['glass'].get('lowest')):.2f})")
        if not self.decisive and not self.confirmed:
            return (f"; a placement one module pitch away fits almost as well (evidence ratio {low:.2f}, more "
                    f"than {1.0 + float(cfg['pitch_min_margin']):.2f} needed): findings may sit on the "
                    "neighbouring module")
        if not self.ends["decisive"]:
            return (f"; the table ends prefer a placement one module pitch away (median vote "
                    f"{self.ends['lowest']:.2f}, more than {self.ends['limit']:g} needed): findings may sit on the "
                    "neighbouring module")
        return ""


def _pitch_verdict(orthos: Any, modules: gpd.GeoDataFrame, cur: Placement, q_cur: Mapping[str, Any],
                   alts: list[tuple[np.ndarray, dict]], dirs: list[str], steps: list[np.ndarray],
                   cfg: Mapping[str, Any], sun: tuple[float, ...] | None,
                   correlation: tuple[Placement | None, float]) -> _Verdict:
    """Every one-pitch test of the placement ``cur`` (its quality ``q_cur``) against ``alts``,
    the qualities of the same placement moved by each of ``steps`` (directions ``dirs``)."""
    e_cur = _num(q_cur["evidence"])
    ratios = [_num(q["evidence"]) / e_cur for _, q in alts if math.isfinite(_num(q["evidence"]))] if (
        math.isfinite(e_cur) and e_cur > 0) else []
    low = min(ratios) if ratios else float("inf")
    decisive = low > 1.0 + float(cfg["pitch_min_margin"])
    ends = judge_ends(orthos, modules, apply_placement(modules, cur), cfg, sun)
    # the table ends alone clearly for the placement (well above any vote of one a pitch off)
    # ... unless a placement one module pitch away fits the modules clearly better
    confirmed = (ends.get("lowest") is not None and ends["lowest"] >= float(cfg["ends_confirm_vote"])
                 and not low < float(cfg["ends_confirm_min_ratio"]))
    # neither alone decisive, but both lean the same way: the placement fits the modules better
    # than every placement one module pitch away, and no table end prefers one of those
    e_low = ends.get("lowest")
    both = (not decisive and not confirmed and math.isfinite(low) and low >= float(cfg["pitch_support_ratio"])
            and e_low is not None and e_low >= float(cfg["ends_support_vote"]))
    # ... or each direction's alternatives fit the modules worse or leave glass beyond a sunlit end
    by_glass = not (decisive or confirmed or both) and glass_decides(
        ends.get("glass") or {}, dirs, [_num(q["evidence"]) / e_cur for _, q in alts] if e_cur > 0 else [], cfg)
    corr_p, corr_conf = correlation
    bounds = modules.total_bounds
    gap = _largest_gap(cur, corr_p, bounds) if corr_p is not None else float("nan")
    by_corr = (math.isfinite(gap) and gap <= float(cfg["pitch_corr_agree_m"])
               and corr_conf >= float(cfg["pitch_corr_confidence"]))
    # the correlation one module pitch from the placement: the module evidence alone would
    # move the layout by a whole pitch against it
    gaps_pitch = [_largest_gap(replace(cur, tx=cur.tx + float(v[0]), ty=cur.ty + float(v[1])), corr_p, bounds)
                  for v in steps] if corr_p is not None else []
    gap_pitch = min(gaps_pitch) if gaps_pitch else float("nan")
    against = (math.isfinite(gap_pitch) and gap_pitch <= float(cfg["pitch_corr_against_m"])
               and corr_conf >= float(cfg["pitch_corr_confidence"]))
    return _Verdict(low, bool(decisive), ends, bool(confirmed), bool(both), bool(by_glass), bool(by_corr),
                    bool(against), gap, gap_pitch, float(corr_conf))


def _resolve_pitch(orthos: Any, modules: gpd.GeoDataFrame, reg: Registration, cfg: Mapping[str, Any], ident: Placement,
                   sun: tuple[float, ...] | None, expected_c: float | None,
                   correlation: tuple[Placement | None, float] = (None, 0.0)) -> None:
    """The one-pitch ambiguity of rows, decided at full resolution on module evidence.

    Rows of modules are periodic: the placement used and the same placement one module
    pitch along or across the table rows put footprints on modules everywhere but at the
    table ends. Each such alternative is judged on its own sample (footprints read where it
    puts them); an alternative whose evidence is below ``pitch_move_ratio`` times the
    placement's replaces it (up to ``pitch_max_steps`` times). ``reg.evidence["pitch"]``
    records the lowest ratio evidence(alternative) / evidence(used), ``decisive`` when it
    exceeds ``1 + pitch_min_margin``, and ``ends``: the table ends alone
    (:func:`pvscan.measure.register.ends.judge_ends`). Either one indecisive leaves the
    placement in use but fails the ``registration`` validity check (a finding may sit on
    the neighbouring module), unless the table ends vote clearly for it
    (``ends_confirm_vote``; not when an alternative's evidence is below ``ends_confirm_min_ratio``
    times the placement's) or the block correlation does: its own placement (``correlation``:
    placement, confidence), confident (``pitch_corr_confidence``), moves no footprint more
    than ``pitch_corr_agree_m`` from the one used. A placement decided on module evidence is
    flagged all the same when that confident correlation sits one module pitch from it
    (within ``pitch_corr_against_m``) and the table ends do not confirm it.

    A placement the decision leaves undecided is replaced by the alternative one module pitch
    away that fits the modules best, when that one's evidence is at most ``pitch_switch_ratio``
    times the placement's and it passes the same decision in its own right (the table ends, the
    glass beyond them or the correlation for it): ``reg.evidence["pitch"]["switch"]``."""
    base = reg.placement if (reg.applied and reg.placement is not None) else ident
    dirs, steps = pitch_steps(modules)
    if not steps:
        return

    def alternatives(p0: Placement, known: dict[int, dict] | None = None) -> list[tuple[np.ndarray, dict]]:
        return [(v, (known or {}).get(k) or _judge(_sample_at(
            orthos, modules, replace(p0, tx=p0.tx + float(v[0]), ty=p0.ty + float(v[1])), cfg), ident, cfg, sun,
            expected_c)) for k, v in enumerate(steps)]

    # the table corrections of a placement rescued table by table stay: without them its
    # footprints straddle the module edges and every alternative looks almost as good
    cur = base
    q_cur = _judge(_sample_at(orthos, modules, cur, cfg), ident, cfg, sun, expected_c)
    moved_by = np.zeros(2)
    rounds = int(cfg["pitch_max_steps"])
    alts: list[tuple[np.ndarray, dict]] = []
    for _ in range(rounds + 1):
        alts = alternatives(cur)
        move_below = float(cfg["pitch_move_ratio"]) * _num(q_cur["evidence"])
        better = [(v, q) for v, q in alts if q["ok"] and _num(q["evidence"]) < move_below]
        if not better or len(reg.evidence.get("pitch_moves", [])) >= rounds:
            break
        v, q = min(better, key=lambda t: _num(t[1]["evidence"]))
        reg.evidence.setdefault("pitch_moves", []).append([round(float(v[0]), 4), round(float(v[1]), 4)])
        cur = replace(cur, tx=cur.tx + float(v[0]), ty=cur.ty + float(v[1]))
        moved_by += v
        q_cur = q
    verdict = _pitch_verdict(orthos, modules, cur, q_cur, alts, dirs, steps, cfg, sun, correlation)
    switch = _switch(orthos, modules, cur, q_cur, alts, verdict, alternatives, dirs, steps, cfg, sun, correlation)
    if switch is not None and switch[0]["used"]:
        rec, cur, q_cur, verdict = switch
        moved_by += np.asarray(rec["moved_m"], float)
    reg.evidence["pitch"] = {**verdict.record(cfg), "moved_m": [round(float(moved_by[0]), 4),
                                                                round(float(moved_by[1]), 4)]}
    if switch is not None:
        reg.evidence["pitch"]["switch"] = switch[0]
    if np.hypot(*moved_by) > 0:
        _use_placement(reg, cur)
        reg.evidence["chosen"] = q_cur
        reg.evidence["used"] = "pitch"
        why = ("where the table ends fit better" if switch is None or not switch[0]["used"] else
               f"where the modules fit better (evidence ratio {switch[0]['ratio']:.2f}) and the one-pitch "
               "decision holds")
        reg.message += (f"; moved by ({moved_by[0]:+.3f}, {moved_by[1]:+.3f}) m, whole module pitches along or "
                        f"across the rows, {why} (evidence {_num(q_cur['evidence']):.3f})")
    reg.message += verdict.message(cfg)
    if verdict.ambiguous:
        reg.status = "ambiguous"


def _switch(orthos: Any, modules: gpd.GeoDataFrame, cur: Placement, q_cur: dict, alts: list[tuple[np.ndarray, dict]],
            verdict: _Verdict, alternatives: Callable[..., list[tuple[np.ndarray, dict]]], dirs: list[str],
            steps: list[np.ndarray], cfg: Mapping[str, Any], sun: tuple[float, ...] | None,
            correlation: tuple[Placement | None, float]) -> tuple[dict, Placement, dict, _Verdict] | None:
    """The alternative one module pitch away that an undecided placement gives way to.

    Only when ``verdict`` is ambiguous: the alternative with the lowest evidence, if at most
    ``pitch_switch_ratio`` times the placement's and on glass, is put through the same decision
    (its own alternatives, the placement among them); it is used when that decision holds.
    An alternative whose footprints read further from the expected apparent temperature of
    sunlit glass than the placement's by more than ``pitch_switch_glass_k`` [K] is not tried
    (``record["glass_error_k"]``): moved one module row across a table of tilted modules, half
    its footprints sit beside the table, on ground as even as glass but not as warm.
    Returns (record, placement, quality, verdict) of the alternative tried (``record["used"]``
    says whether it is used), or None when none was tried."""
    e_cur = _num(q_cur["evidence"])
    lim = float(cfg["pitch_switch_ratio"])
    if not verdict.ambiguous or not (math.isfinite(e_cur) and e_cur > 0) or lim <= 0:
        return None
    cands = [(k, v, q) for k, (v, q) in enumerate(alts) if q["ok"] and _num(q["evidence"]) <= lim * e_cur]
    if not cands:
        return None
    k, v, q = min(cands, key=lambda t: _num(t[2]["evidence"]))
    alt = replace(cur, tx=cur.tx + float(v[0]), ty=cur.ty + float(v[1]))
    rec = {"moved_m": [round(float(v[0]), 4), round(float(v[1]), 4)], "direction": dirs[k],
           "ratio": round(_num(q["evidence"]) / e_cur, 4), "limit": lim, "used": False, "before": verdict.votes()}
    g_cur, g_alt = abs(_num(q_cur.get("glass_error_k"))), abs(_num(q.get("glass_error_k")))
    if math.isfinite(g_cur) and math.isfinite(g_alt) and g_alt - g_cur > float(cfg["pitch_switch_glass_k"]):
        rec["glass_error_k"] = {"placement": round(g_cur, 3), "alternative": round(g_alt, 3),
                                "limit": float(cfg["pitch_switch_glass_k"])}
        return rec, alt, q, verdict
    # the placement itself is the alternative one pitch back: its quality is known
    back = [j for j, w in enumerate(steps) if np.allclose(w, -v)]
    alts2 = alternatives(alt, {back[0]: q_cur} if back else None)
    v2 = _pitch_verdict(orthos, modules, alt, q, alts2, dirs, steps, cfg, sun, correlation)
    rec["used"] = not v2.ambiguous
    rec["after"] = v2.votes()
    return rec, alt, q, v2
