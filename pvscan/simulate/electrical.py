"""The simulator's electrical model: what a module delivers, and the heat of what it does not.

The module is a single-diode equivalent circuit with the De Soto et al. [1]_ translation to
irradiance and cell temperature (:func:`pvlib.pvsystem.calcparams_desoto`), solved for its
maximum power point by :func:`pvlib.pvsystem.max_power_point`. Its reference parameters
are set from the datasheet (``voc_v``, ``isc_a`` and ``pmax_w``; ``voc_v``/``isc_a`` taken as
0.682 V per series cell and a fill factor ``pmax / (voc isc)`` of 0.79 when the scenario does
not give them, common practice for mono PERC): diode ideality 1.1 (from memory, typical of
crystalline silicon), shunt resistance 400 ohm, saturation current from ``voc``, and the
series resistance solved (:func:`scipy.optimize.brentq`) so the maximum power at STC equals
``pmax_w``, the band gap so the temperature coefficient of the maximum power is the
datasheet's ``gamma_pmax_pct_per_k``.

The heat of a defect is the electrical power the module does not deliver. A module that is
open (or in an open string) carries no current and delivers nothing, so the power ``P_mp(G, T)``
it would have delivered at its irradiance and temperature stays in the glass as heat; a
bypassed substring likewise keeps its share. Spread over the area it is shed through, the
Faiman heat-loss coefficient turns it into a rise ``P / (U(v) * A)``. Unlike the STC
efficiency ``eta * G / U`` this falls with the module's temperature (the cell temperature
coefficient of the diode model) and at low light.

References
----------
.. [1] W. De Soto, S. A. Klein and W. A. Beckman, "Improvement and validation of a model
   for photovoltaic array performance", Solar Energy 80(1), 78-88, 2006.
   doi:10.1016/j.solener.2005.06.010
.. [2] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
"""
from __future__ import annotations

import functools
import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy import constants, optimize

from pvscan._typing import FloatArray

__all__ = ["DiodeModule", "diode_module", "faiman"]

_IDEALITY = 1.1
_R_SH_OHM = 400.0


def faiman(poa_global: ArrayLike, temp_air: ArrayLike, wind_speed: ArrayLike, u0: float = 25.0,
           u1: float = 6.84) -> FloatArray:
    """Module temperature by the Faiman model [degC] (:func:`pvlib.temperature.faiman`).

    Parameters
    ----------
    poa_global : array_like
        Plane-of-array irradiance [W/m2].
    temp_air : array_like
        Air temperature [degC].
    wind_speed : array_like
        Wind speed [m/s].
    u0 : float
        Constant heat-loss coefficient [W/(m2 K)].
    u1 : float
        Wind heat-loss coefficient [W s/(m3 K)].
    """
    import pvlib

    return np.asarray(pvlib.temperature.faiman(np.asarray(poa_global, float), np.asarray(temp_air, float),
                                               np.asarray(wind_speed, float), u0=u0, u1=u1), float)


class DiodeModule:
    """Single-diode model of one module type (see the module notes).

    Parameters
    ----------
    pmax_w : float
        Maximum power at STC [W].
    cells_series : int
        Cells in series.
    voc_v, isc_a : float
        Open-circuit voltage [V] and short-circuit current [A] at STC.
    gamma_pmax_pct_per_k : float
        Datasheet temperature coefficient of the maximum power [%/K]; the band gap ``EgRef``
        of the De Soto translation is solved so the model has it between 25 and 50 degC.
    """

    def __init__(self, pmax_w: float, cells_series: int, voc_v: float, isc_a: float,
                 gamma_pmax_pct_per_k: float = -0.35) -> None:
        self.pmax_w, self.voc_v, self.isc_a = float(pmax_w), float(voc_v), float(isc_a)
        self.a_ref = _IDEALITY * int(cells_series) * constants.k * (25.0 + constants.zero_Celsius) / constants.e
        self.i0_ref = self.isc_a / math.expm1(self.voc_v / self.a_ref)
        self.alpha_sc = 0.0005 * self.isc_a  # [A/K], common practice for crystalline silicon
        self.eg_ref = 1.121                  # [eV], silicon (De Soto et al. 2006)
        self.r_s = optimize.brentq(lambda r: float(self.p_mp(1000.0, 25.0, r_s=r)) - self.pmax_w,
                                   0.0, 5.0, xtol=1e-9)
        target = 1.0 + 25.0 * float(gamma_pmax_pct_per_k) / 100.0

        def miss(eg: float) -> float:
            self.eg_ref = eg
            return float(self.p_mp(1000.0, 50.0) / self.p_mp(1000.0, 25.0)) - target

        try:
            self.eg_ref = optimize.brentq(miss, 0.6, 1.8, xtol=1e-6)
        except ValueError:  # coefficient outside what the model can give: keep silicon's
            self.eg_ref = 1.121

    def p_mp(self, poa_global: ArrayLike, temp_cell: ArrayLike, r_s: float | None = None) -> FloatArray:
        """Power at the maximum power point [W] at irradiance [W/m2] and cell temperature [degC]."""
        import pvlib

        g = np.maximum(np.asarray(poa_global, float), 1.0)
        il, i0, rs, rsh, nnsvth = pvlib.pvsystem.calcparams_desoto(
            g, np.asarray(temp_cell, float), self.alpha_sc, self.a_ref, self.isc_a, self.i0_ref,
            _R_SH_OHM, self.r_s if r_s is None else r_s, EgRef=self.eg_ref)
        return np.asarray(pvlib.pvsystem.max_power_point(il, i0, rs, rsh, nnsvth)["p_mp"], float)


@functools.lru_cache(maxsize=16)
def _cached(pmax_w: float, cells_series: int, voc_v: float, isc_a: float, gamma: float) -> DiodeModule:
    return DiodeModule(pmax_w, cells_series, voc_v, isc_a, gamma)


def diode_module(module: Mapping[str, Any]) -> DiodeModule:
    """The :class:`DiodeModule` of a scenario's ``[module]`` table (cached)."""
    ns = int(module["cells_across"]) * int(module["cells_along"])
    voc = float(module.get("voc_v", 0.682 * ns))
    isc = float(module.get("isc_a", float(module["pmax_w"]) / (0.79 * voc)))
    return _cached(float(module["pmax_w"]), ns, voc, isc, float(module.get("gamma_pmax_pct_per_k", -0.35)))
