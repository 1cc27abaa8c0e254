"""Pattern search of the placement minimising the module evidence, for one placement or for
many translations at once (the tables of a plant, each on its own modules).

The search is Hooke and Jeeves' direct search [1]_, written once as a generator that yields
the placements it needs measured and receives their evidence: :func:`refine_placement`
measures them one by one; :func:`refine_translations` runs the searches of many groups of
modules in lockstep and measures every pending placement of a round in one vectorised call
(each group's search takes exactly the path it would take alone: the steps, the order of
trials and the cache of measured placements are the same; only the sums over pixels are
grouped differently, which changes results by rounding, ~1e-13 of a spread).

References
----------
.. [1] R. Hooke and T. A. Jeeves, "'Direct search' solution of numerical and statistical
   problems", Journal of the ACM 8(2), 212-229, 1961. doi:10.1145/321062.321069
"""
from __future__ import annotations

import math
from collections.abc import Generator, Mapping, Sequence
from typing import Any

import numpy as np

from pvscan.measure.register.evidence import (
    _SPREAD_CHUNK,
    ModuleSample,
    Placement,
    _spread_chunk,
    evidence,
    module_spread,
    off_glass_near,
)

__all__ = ["refine_placement", "refine_translations", "FINEST_STEP_SHARE"]

#: The pattern search halves each first step until below this share of it: its finest step [-].
FINEST_STEP_SHARE = 1.0 / 8.0

_Search = Generator[Placement, float, tuple[Placement, float]]


def _key(p: Placement) -> tuple[str, ...]:
    # the exact numbers (float.hex tells -0.0 from 0.0): a hit is the same sum
    return tuple(float(v).hex() for v in (p.tx, p.ty, p.theta_deg, p.scale))


def _pattern_search(start: Placement, cfg: Mapping, *, rotate: bool, scale: bool,
                    start_evidence: float | None) -> _Search:
    """Hooke and Jeeves from ``start``: yields each placement to be measured (never one twice),
    receives its evidence; returns the best placement and its evidence."""
    seen: dict[tuple[str, ...], float] = {}

    def f(p: Placement) -> Generator[Placement, float, float]:
        k = _key(p)
        if k not in seen:
            e = yield p
            seen[k] = e if math.isfinite(e) else float("inf")
        return seen[k]

    steps = {"tx": float(cfg["evidence_step_m"]), "ty": float(cfg["evidence_step_m"])}
    if rotate:
        steps["theta_deg"] = float(cfg["evidence_step_deg"])
    if scale:
        steps["scale"] = float(cfg["evidence_step_scale"])
    lim_shift = float(cfg["max_shift_m"])
    lim_rot = float(cfg["max_rotation_deg"])
    lim_scale = float(cfg["max_scale_error"])
    if start_evidence is not None:
        f_start = float(start_evidence)
        seen[_key(start)] = f_start if math.isfinite(f_start) else float("inf")
    best = start
    fb = yield from f(start)
    floor = {k: v * FINEST_STEP_SHARE for k, v in steps.items()}
    for _ in range(200):
        improved = False
        for key, st in steps.items():
            for sgn in (1.0, -1.0):
                val = getattr(best, key) + sgn * st
                if key in ("tx", "ty") and abs(val) > lim_shift + 1e-9:
                    continue
                if key == "theta_deg" and abs(val) > lim_rot + 1e-9:
                    continue
                if key == "scale" and abs(val - 1.0) > lim_scale + 1e-12:
                    continue
                p = best.moved(**{key: val})
                fp = yield from f(p)
                if fp < fb - 1e-9:
                    best, fb, improved = p, fp, True
                    break
        if not improved:
            if all(steps[k] <= floor[k] * 1.0001 for k in steps):
                break
            steps = {k: max(v / 2.0, floor[k]) for k, v in steps.items()}
    return best, fb


def _spread_kw(cfg: Mapping) -> dict[str, Any]:
    kw: dict[str, Any] = {"inset_u": float(cfg["evidence_inset"]), "inset_v": float(cfg["evidence_inset"])}
    if cfg.get("evidence_band_m") is not None:
        # the outline contrast widens the basin; without it (the last, local stage) the plain
        # spread inside a nearly whole footprint has its minimum where the module is
        kw.update(band_m=float(cfg["evidence_band_m"]), off_glass_k=float(cfg["evidence_off_glass_k"]),
                  off_glass_near=off_glass_near(cfg))
    return kw


def refine_placement(sample: ModuleSample, start: Placement, cfg: Mapping, *, rotate: bool = True,
                     scale: bool = True, start_evidence: float | None = None) -> tuple[Placement, float]:
    """Pattern search (Hooke and Jeeves 1961) of the placement minimising the evidence.

    Steps start at ``evidence_step_m`` (translation), ``evidence_step_deg`` (rotation) and
    ``evidence_step_scale`` and are halved until below an eighth of that; rotation and scale
    are searched only when asked. The evidence is the spread over the outline contrast, or
    the plain spread [K] when ``cfg["evidence_band_m"]`` is None. Returns the best placement
    and its evidence. ``start_evidence``, when the caller has it, is the evidence of
    ``start`` with these settings (not computed again). A placement the search comes back to
    (a step forth and back gives the same numbers) is not measured twice.
    """
    kw = _spread_kw(cfg)
    search = _pattern_search(start, cfg, rotate=rotate, scale=scale, start_evidence=start_evidence)
    try:
        p = next(search)
        while True:
            p = search.send(evidence(module_spread(sample, p, **kw)))
    except StopIteration as done:
        best, fb = done.value
    return best, fb


def group_evidence(sample: ModuleSample, placement: Placement, groups: Sequence[np.ndarray], cfg: Mapping,
                   local: np.ndarray | None = None) -> list[float]:
    """The plain-spread evidence (``cfg["evidence_inset"]``, no outline band) of each group of
    sampled modules (positions in ``sample``) at ``placement`` (plus ``local``, (k, 2) per
    module of the sample [m]): what :func:`~pvscan.measure.register.evidence.evidence` of
    each group's own :func:`~pvscan.measure.register.evidence.module_spread` gives, in one
    vectorised pass."""
    if cfg.get("evidence_band_m") is not None:
        raise ValueError("group_evidence measures the plain spread (evidence_band_m = None)")
    if not len(groups):
        return []
    idx = np.concatenate([np.asarray(g, np.int64) for g in groups])
    inset = float(cfg["evidence_inset"])
    parts = [_spread_chunk(sample, placement, idx[lo:lo + _SPREAD_CHUNK], inset_u=inset, inset_v=inset,
                           local=local, min_pixels=8, band_m=None)[0]
             for lo in range(0, len(idx), _SPREAD_CHUNK)]
    sd = np.concatenate(parts)
    cut = np.cumsum([len(g) for g in groups])[:-1]
    return [evidence(part) for part in np.split(sd, cut)]


def refine_translations(sample: ModuleSample, groups: Sequence[np.ndarray], start: Placement, cfg: Mapping, *,
                        start_evidence: Sequence[float] | None = None) -> list[tuple[Placement, float]]:
    """One translation per group of sampled modules (positions in ``sample``): the search of
    :func:`refine_placement` (``rotate`` and ``scale`` off, plain spread: ``evidence_band_m``
    None) of every group from ``start``, run in lockstep; each round measures the pending
    placement of every unfinished group in one pass. Returns ``(placement, evidence)`` per
    group, in order."""
    if cfg.get("evidence_band_m") is not None:
        raise ValueError("refine_translations searches the plain spread (evidence_band_m = None)")
    base = start.moved(tx=0.0, ty=0.0)
    out: list[tuple[Placement, float] | None] = [None] * len(groups)
    searches: dict[int, _Search] = {}
    pending: dict[int, Placement] = {}
    for g in range(len(groups)):
        e0 = None if start_evidence is None else start_evidence[g]
        searches[g] = _pattern_search(start, cfg, rotate=False, scale=False, start_evidence=e0)
        try:
            pending[g] = next(searches[g])
        except StopIteration as done:
            out[g] = done.value
    local = np.zeros((len(sample), 2))
    while pending:
        order = list(pending)
        for g in order:
            # the base placement plus the group's translation: the same numbers per module as
            # the group's placement alone (0.0 + t = t)
            local[groups[g]] = (pending[g].tx, pending[g].ty)
        values = group_evidence(sample, base, [groups[g] for g in order], cfg, local=local)
        for g, e in zip(order, values):
            try:
                pending[g] = searches[g].send(e)
            except StopIteration as done:
                out[g] = done.value
                del pending[g]
    return [r if r is not None else (start, float("inf")) for r in out]
