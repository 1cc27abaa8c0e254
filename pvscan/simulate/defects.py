"""Defect patterns of the simulator: where they sit, how much heat they add, what they cost.

Every defect turns part of the module's electrical output into heat. With the Faiman
heat-loss coefficient ``U(v) = u0 + u1 * v`` [W/(m2 K)] a surface heat flux ``q`` [W/m2]
raises the module temperature by ``q / U``. An open module (no current) keeps the power
it would have delivered, ``P_mp(G, T)`` from the single-diode model of
:mod:`pvscan.simulate.electrical`, so it is warmer by ``dT_open = P_mp / (U(v) * area)``
(close to, but not the same as, ``eta * G / U``). A bypassed substring does
the same over its strip, a PID-affected module over the fraction ``f`` of its output it
lost. Spot patterns (hot cells, soiling band, junction box) are given a temperature rise;
their power loss follows from the same energy balance, ``P_heat = U * integral(rise dA)``,
scaled to STC by ``1000 / G`` and capped at one substring's share ``pmax / bypass_diodes``
(beyond that the bypass diode conducts). Every rise is a function of module-local (u, v),
so the rendering of the ortho and the truth read the same model.

References
----------
D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing, documentation
and maintenance - Part 3: Photovoltaic modules and plants - Outdoor infrared thermography.
"""
from __future__ import annotations

import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike

from pvscan._typing import FloatArray, IntArray
from pvscan.errors import PvscanWarning
from pvscan.simulate.scenario import DEFECT_KINDS, Scenario

if TYPE_CHECKING:
    from pvscan.simulate.geometry import Field

#: A region in module-local coordinates: (u0, u1, v0, v1) [-].
Box = tuple[float, float, float, float]

__all__ = ["Defect", "ModuleGeometry", "place_defects", "SPOT_PATTERNS"]


#: Patterns whose region temperature is its 95th percentile (the others use the median).
SPOT_PATTERNS = frozenset({"hot_cell", "several_hot_cells", "junction_box"})


@dataclass(frozen=True)
class ModuleGeometry:
    """What a defect needs to know about the module [m], [-]."""

    length_m: float
    width_m: float
    n_along: int
    n_across: int
    bypass_diodes: int
    lower_edge: str          # "u" (portrait) or "v" (landscape)
    junction_box: str        # "edge" or "split"
    pmax_w: float
    u_ref: float = 25.0 + 6.84 * 1.0  # Faiman U at the reference wind of 1 m/s [W/(m2 K)]
    p_ref_w: float | None = None      # power delivered at 1000 W/m2, 1 m/s, 25 degC air [W]

    @property
    def area_m2(self) -> float:
        return self.length_m * self.width_m

    @property
    def eta(self) -> float:
        return self.pmax_w / (1000.0 * self.area_m2)

    @property
    def dt_open_ref(self) -> float:
        """Open-module rise at reference conditions (1000 W/m2, 1 m/s) [K]: the power the
        module delivers there (``p_ref_w``, else ``eta * 1000 W/m2 * area``) over ``U(1) * area``."""
        p = self.eta * 1000.0 * self.area_m2 if self.p_ref_w is None else self.p_ref_w
        return p / (self.u_ref * self.area_m2)


@dataclass
class Defect:
    """One defect on one module.

    Attributes
    ----------
    kind : str
        A pattern of the defect vocabulary.
    module : int
        Module index.
    group : int
        Defect instance number (modules of one open string or PID string share it).
    params : dict
        Pattern parameters (cells, substrings, rise, centre ...).
    boxes : list of (u0, u1, v0, v1)
        Affected region(s) in module-local coordinates.
    """

    kind: str
    module: int
    group: int
    params: dict[str, Any] = field(default_factory=dict)
    boxes: list[Box] = field(default_factory=list)

    @property
    def spot(self) -> bool:
        return self.kind in SPOT_PATTERNS

    def rise(self, u: ArrayLike, v: ArrayLike, geom: ModuleGeometry, dt_open: float) -> FloatArray:
        """Temperature rise of this defect at module-local points [K].

        Parameters
        ----------
        u, v : ndarray
            Module-local coordinates [-].
        geom : ModuleGeometry
        dt_open : float
            Rise of a fully open module at this module's conditions, P_mp / (U(v) * area) [K].

        Notes
        -----
        Hot cells, soiling and junction-box spots dissipate power that grows with the
        current, i.e. with irradiance, and shed it through the same heat-loss coefficient
        as the module. Their ``rise_k`` parameters are therefore given at the reference
        conditions of the normalisation (1000 W/m2, wind 1 m/s) and scaled here by
        ``(G / 1000) * (U(1) / U(v)) = dt_open / dt_open_ref``, so one defect keeps its
        normalised delta T from one season to the next.
        """
        u = np.asarray(u, float)
        v = np.asarray(v, float)
        k = self.kind
        p = self.params
        scale = float(dt_open) / geom.dt_open_ref  # reference -> this module's conditions
        if k in ("open_module", "open_string"):
            return np.full(u.shape, dt_open)
        if k in ("bypassed_substring", "several_bypassed_substrings"):
            sub = np.clip(np.floor(v * geom.bypass_diodes), 0, geom.bypass_diodes - 1)
            return np.where(np.isin(sub, p["substrings"]), dt_open, 0.0)
        if k == "pid":
            ci = np.clip(np.floor(u * geom.n_along).astype(int), 0, geom.n_along - 1)
            cj = np.clip(np.floor(v * geom.n_across).astype(int), 0, geom.n_across - 1)
            w = np.asarray(p["cell_weights"])
            return p["loss_fraction"] * dt_open * w[ci, cj]
        if k in ("hot_cell", "several_hot_cells"):
            out = np.zeros(u.shape)
            cu = geom.length_m / geom.n_along
            cv = geom.width_m / geom.n_across
            sig = 0.12 * min(cu, cv)
            um = u * geom.length_m
            vm = v * geom.width_m
            for (i, j), r in zip(p["cells"], p["rise_k"]):
                du = np.maximum(0.0, np.maximum(i * cu - um, um - (i + 1) * cu))
                dv = np.maximum(0.0, np.maximum(j * cv - vm, vm - (j + 1) * cv))
                out = np.maximum(out, scale * r * np.exp(-(du ** 2 + dv ** 2) / (2 * sig ** 2)))
            return out
        if k == "soiling":
            x = u if geom.lower_edge == "u" else v
            h = p["height"]
            fall = 0.3 * h
            shape = np.where(x <= h, 1.0, np.exp(-((x - h) / fall) ** 2))
            return scale * p["rise_k"] * shape
        if k == "junction_box":
            uc, vc = p["centre"]
            du = (u - uc) * geom.length_m
            dv = (v - vc) * geom.width_m
            sig = p["fwhm_m"] / 2.3548
            return scale * p["rise_k"] * np.exp(-(du ** 2 + dv ** 2) / (2 * sig ** 2))
        raise ValueError(f"unknown defect pattern {k}")  # pragma: no cover


def _boxes_of(d: Defect, geom: ModuleGeometry, gsd: float) -> list[Box]:
    p = d.params
    nd = geom.bypass_diodes
    if d.kind in ("open_module", "open_string", "pid"):
        return [(0.0, 1.0, 0.0, 1.0)]
    if d.kind in ("bypassed_substring", "several_bypassed_substrings"):
        return [(0.0, 1.0, k / nd, (k + 1) / nd) for k in p["substrings"]]
    if d.kind in ("hot_cell", "several_hot_cells"):
        return [(i / geom.n_along, (i + 1) / geom.n_along, j / geom.n_across, (j + 1) / geom.n_across)
                for i, j in p["cells"]]
    if d.kind == "soiling":
        h = p["height"]
        return [(0.0, h, 0.0, 1.0)] if geom.lower_edge == "u" else [(0.0, 1.0, 0.0, h)]
    if d.kind == "junction_box":
        uc, vc = p["centre"]
        hu = p["fwhm_m"] / geom.length_m
        hv = p["fwhm_m"] / geom.width_m
        return [(max(0.0, uc - hu), min(1.0, uc + hu), max(0.0, vc - hv), min(1.0, vc + hv))]
    raise ValueError(d.kind)  # pragma: no cover


def _pid_weights(rng: np.random.Generator, geom: ModuleGeometry) -> FloatArray:
    """Patchy per-cell weights of a PID-affected module, mean 1 over the cells [-].

    PID shunts cells unevenly, most often those next to the grounded frame (common
    practice: the 'checkerboard' pattern strongest at the module edges).
    """
    na, nc = geom.n_along, geom.n_across
    ii, jj = np.indices((na, nc))
    edge = (ii == 0) | (ii == na - 1) | (jj == 0) | (jj == nc - 1)
    w = rng.gamma(2.0, 0.5, size=(na, nc)) + np.where(edge, 1.0, 0.2)
    return w / w.mean()


def place_defects(rng: np.random.Generator, sc: Scenario, fld: Field, geom: ModuleGeometry) -> list[Defect]:
    """Choose modules and parameters for the scenario's defects.

    Defects never share a module, and two defect instances in the same table are at least
    ``defects.min_spacing_modules`` columns apart, so every defect has healthy neighbours
    for its local reference. The defects are placed in the order of :data:`DEFECT_KINDS`;
    when that leaves an open string or PID string without a free string (a small plant with
    few strings), the placement starts again from the same random state with the string
    defects first (the largest items first), so every plant that can hold them gets them.

    Returns
    -------
    list of Defect
        One entry per affected module (an open string gives one entry per module).
    """
    state = rng.bit_generator.state
    out, short = _place(rng, sc, fld, geom, DEFECT_KINDS)
    if any(k in _STRING_KINDS for k in short):
        rng.bit_generator.state = state
        order = tuple(k for k in DEFECT_KINDS if k in _STRING_KINDS) + \
            tuple(k for k in DEFECT_KINDS if k not in _STRING_KINDS)
        out, short = _place(rng, sc, fld, geom, order)
    for kind, what in short.items():
        warnings.warn(f"defects.{kind}: no free {what} left; placed fewer than asked", PvscanWarning, stacklevel=2)
    return out


_STRING_KINDS = ("open_string", "pid")


def _place(rng: np.random.Generator, sc: Scenario, fld: Field, geom: ModuleGeometry,
           order: Sequence[str]) -> tuple[list[Defect], dict[str, str]]:
    """Defects placed in ``order`` of kinds; also the kinds placed fewer than asked."""
    dcfg = sc["defects"]
    gsd = sc["camera"]["gsd_m"]
    m = fld.modules
    n = fld.n_modules
    blocked = np.zeros(n, bool)
    spacing = int(dcfg["min_spacing_modules"])
    key_table = m["trow"] * fld.n_tables + m["table"]
    out: list[Defect] = []
    short: dict[str, str] = {}
    group = 0

    def block(idxs: Iterable[int]) -> None:
        for i in idxs:
            same = (key_table == key_table[i]) & (np.abs(m["col"] - m["col"][i]) <= spacing)
            blocked[same] = True

    def free_module() -> int | None:
        cand = np.flatnonzero(~blocked)
        if cand.size == 0:
            return None
        return int(rng.choice(cand))

    def string_members(sid: str) -> IntArray:
        idx = np.flatnonzero(m["string_id"] == sid)
        return idx[np.argsort(m["string_index"][idx])]

    nd = geom.bypass_diodes
    for kind in order:
        for _ in range(int(dcfg[kind])):
            if kind in _STRING_KINDS:
                strings = [s for s in np.unique(m["string_id"]) if not blocked[string_members(s)].any()]
                if not strings:
                    short[kind] = "string"
                    break
                members = string_members(strings[int(rng.integers(len(strings)))])
                if kind == "open_string":
                    run = int(dcfg["open_string_modules"]) or len(members)
                    run = min(run, len(members))
                    start = int(rng.integers(0, len(members) - run + 1))
                    chosen = members[start:start + run]
                    for i in chosen:
                        out.append(Defect(kind, int(i), group))
                else:
                    lo, hi = dcfg["pid_modules"]
                    npid = int(min(len(members), rng.integers(lo, hi + 1)))
                    f0 = float(rng.uniform(*dcfg["pid_loss_fraction"]))
                    chosen = members[:npid]
                    for k, i in enumerate(chosen):
                        f = f0 * (1.0 / 3.0) ** (k / max(npid - 1, 1))
                        out.append(Defect(kind, int(i), group, {"loss_fraction": f,
                                                               "cell_weights": _pid_weights(rng, geom)}))
                block(members)
                group += 1
                continue
            i = free_module()
            if i is None:
                short[kind] = "module"
                break
            p: dict[str, Any] = {}
            if kind == "bypassed_substring":
                p["substrings"] = [int(rng.integers(nd))]
            elif kind == "several_bypassed_substrings":
                p["substrings"] = sorted(int(k) for k in rng.choice(nd, size=min(2, nd), replace=False))
            elif kind in ("hot_cell", "several_hot_cells"):
                ncell = 1 if kind == "hot_cell" else int(rng.integers(2, 6))
                lin = rng.choice(geom.n_along * geom.n_across, size=ncell, replace=False)
                p["cells"] = [(int(c // geom.n_across), int(c % geom.n_across)) for c in lin]
                rise_lo, rise_hi = dcfg["hot_cell_rise_k"]
                p["rise_k"] = [float(r) for r in rng.uniform(rise_lo, rise_hi, size=ncell)]
            elif kind == "soiling":
                p["height"] = float(rng.uniform(*dcfg["soiling_height"]))
                p["rise_k"] = float(rng.uniform(*dcfg["soiling_rise_k"]))
            elif kind == "junction_box":
                p["rise_k"] = float(rng.uniform(*dcfg["junction_box_rise_k"]))
                p["fwhm_m"] = float(rng.uniform(*dcfg["junction_box_px"])) * gsd
                if geom.junction_box == "split":
                    k = int(rng.integers(nd))
                    p["centre"] = (0.5, (k + 0.5) / nd)
                    p["box"] = k
                else:
                    # box centre ~8 cm inside the upper short edge (common practice: boxes sit
                    # at the top of the module, near the frame)
                    p["centre"] = (1.0 - 0.08 / geom.length_m, 0.5)
            out.append(Defect(kind, i, group, p))
            block([i])
            group += 1
    for d in out:
        d.boxes = _boxes_of(d, geom, gsd)
    return out, short


def heat_integral(d: Defect, geom: ModuleGeometry, dt_open: float, n: int = 400) -> float:
    """Integral of the rise over the module, ``integral(rise dA)`` [K m2] (midpoint rule)."""
    nu = n
    nv = max(50, int(n * geom.width_m / geom.length_m) * 2)
    uu = (np.arange(nu) + 0.5) / nu
    vv = (np.arange(nv) + 0.5) / nv
    U, V = np.meshgrid(uu, vv, indexing="ij")
    return float(d.rise(U, V, geom, dt_open).mean() * geom.area_m2)


def power_loss_stc(d: Defect, geom: ModuleGeometry, dt_open: float, u_total: float, poa: float) -> float:
    """True power loss of a defect at STC [W].

    Parameters
    ----------
    d : Defect
    geom : ModuleGeometry
    dt_open : float
        P_mp / (U * area) at the module's conditions [K].
    u_total : float
        Faiman U(v) at the module's wind speed [W/(m2 K)].
    poa : float
        Irradiance that drives the defect's heat [W/m2].

    Notes
    -----
    open module / open string: pmax; bypassed substrings: k * pmax / bypass_diodes;
    PID: f * pmax; hot cells, soiling, junction box: the dissipated heat
    ``U * integral(rise dA)`` scaled to 1000 W/m2, at most pmax / bypass_diodes.
    """
    k = d.kind
    if k in ("open_module", "open_string"):
        return geom.pmax_w
    if k in ("bypassed_substring", "several_bypassed_substrings"):
        return geom.pmax_w * len(d.params["substrings"]) / geom.bypass_diodes
    if k == "pid":
        return geom.pmax_w * d.params["loss_fraction"]
    heat = u_total * heat_integral(d, geom, dt_open)
    return float(min(heat * 1000.0 / max(poa, 1.0), geom.pmax_w / geom.bypass_diodes))


__all__ += ["heat_integral", "power_loss_stc"]

