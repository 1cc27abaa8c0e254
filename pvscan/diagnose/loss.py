"""Power and energy loss of every anomaly.

Three estimators, chosen by defect class (or, for unknown classes, by the kind of region):

*Electrical rules* (``loss_method = "electrical_rule"``). A module of ``n`` bypass-diode
substrings in series loses about ``k / n`` of its power when ``k`` substrings are bypassed
(the bypass diode carries the string current around them); an open-circuited module
delivers nothing; an open string delivers nothing from any of its modules:

- ``bypassed_substring``: ``pmax / n``; ``several_bypassed_substrings``: ``k * pmax / n``;
- ``open_module``: ``pmax``; ``open_string``: ``pmax`` for every module of the run.

*Thermal deficit* (``"thermal_deficit"``, for ``pid`` and area patterns over a module). By
the module's heat balance an open-circuited module dissipates the power it would have
converted, ``eta_op * G`` per square metre, so it runs warmer than its neighbours by the
*open-module yardstick* ``dT_open = eta_op * G / U(v)`` [K], with the Faiman heat-loss
coefficient ``U(v) = u0 + u1 * v`` [W/(m2 K)] and the operating efficiency
``eta_op = eta * (1 + gamma_pmax * (T - 25 degC))`` at the Faiman module temperature ``T``.
A module that is warmer by ``dT`` has lost the share ``f = clip(dT / dT_open, 0, 1)`` of its
operating power: ``power_loss_w_flight = f * P_op`` with ``P_op = pmax * G/1000 * (1 +
gamma_pmax * (T - 25))``, and ``power_loss_w = f * pmax`` at STC (the temperature factor
cancels in the ratio, which is where ``gamma_pmax`` matters).

*Heat balance* (``"heat_balance"``, for ``hot_cell``, ``several_hot_cells``, ``soiling``,
``junction_box`` and spot/cell regions). The extra heat leaving a region of area ``A`` that
is warmer by ``dT`` is ``U(v) * A * dT`` [W], plus the heat its conduction halo sheds,
``U(v) * dT * P * L`` for the region's inner edge length ``P`` and the laminate's lateral
conduction length ``L = sqrt(k t / U)`` (thin-fin theory); it is electrical power
dissipated instead of delivered (``power_loss_w_flight``). It is scaled to STC as a share of the operating power
(``* 1000 / G`` and the temperature factor) and bounded by the power of the substrings the
region touches, ``k * pmax / n`` (beyond that the bypass diode takes over).

Energy: ``energy_loss_kwh_per_year = power_loss_w / 1000 * specific_yield`` with the
specific yield [kWh/kWp/yr] of the manifest, else :func:`pvscan.diagnose.energy.specific_yield` from a clear-sky
year at the site.

References
----------
.. [1] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
.. [2] P. Ineichen and R. Perez, "A new airmass independent formulation for the Linke
   turbidity coefficient", Solar Energy 73(3), 151-157, 2002. doi:10.1016/S0038-092X(02)00045-2
.. [3] IEC TS 62446-3:2017, Photovoltaic (PV) systems - Requirements for testing,
   documentation and maintenance - Part 3: Photovoltaic modules and plants - Outdoor
   infrared thermography.
.. [4] W. F. Holmgren, C. W. Hansen and M. A. Mikofski, "pvlib python: a python package for
   modeling solar energy systems", Journal of Open Source Software 3(29), 884, 2018.
   doi:10.21105/joss.00884
"""
from __future__ import annotations

import logging
import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike

from pvscan._typing import FloatArray
from pvscan.diagnose.energy import site_yield
from pvscan.diagnose.severity import assign_severity
from pvscan.io.settings import section
from pvscan.physics.heat import Faiman, faiman_u

__all__ = [
    "estimate_loss",
    "module_losses",
    "open_module_yardstick",
    "bypass_loss",
    "thermal_deficit_fraction",
    "heat_balance_loss",
    "region_area_fraction",
    "region_inner_perimeter_m",
    "lateral_spread_m",
    "substrings_touched",
    "DEFECT_METHOD",
]

log = logging.getLogger(__name__)

#: Estimator of each defect class.
DEFECT_METHOD = {
    "bypassed_substring": "electrical_rule",
    "several_bypassed_substrings": "electrical_rule",
    "open_module": "electrical_rule",
    "open_string": "electrical_rule",
    "pid": "thermal_deficit",
    "hot_cell": "heat_balance",
    "several_hot_cells": "heat_balance",
    "soiling": "heat_balance",
    "junction_box": "heat_balance",
}
_REGION_METHOD = {
    "cell": "heat_balance", "cells": "heat_balance", "spot": "heat_balance",
    "substring": "electrical_rule", "substrings": "electrical_rule",
    "module": "thermal_deficit", "modules": "thermal_deficit", "band": "thermal_deficit",
}


# --------------------------------------------------------------------------- physics


def _temp_factor(gamma_pct_per_k: float, temp_module: ArrayLike) -> FloatArray:
    return 1.0 + gamma_pct_per_k / 100.0 * (np.asarray(temp_module, dtype=float) - 25.0)


def open_module_yardstick(poa_global: Any, wind_speed: Any, efficiency: float, temp_module: Any = None,
                          gamma_pmax_pct_per_k: float = 0.0, *, u0: float, u1: float) -> Any:
    """Temperature rise of an open-circuited module over a working one, ``eta_op * G / U(v)``. [K]

    Parameters
    ----------
    poa_global : float or array-like
        Plane-of-array irradiance. [W/m2]
    wind_speed : float or array-like
        Wind speed. [m/s]
    efficiency : float
        Module efficiency at STC, ``pmax / (1000 W/m2 * area)``. [-]
    temp_module : float or array-like, optional
        Module temperature for the operating efficiency; ``None`` uses the STC efficiency. [degC]
    gamma_pmax_pct_per_k : float
        Power temperature coefficient. [%/K]
    u0, u1 : float
        Faiman coefficients. [W/(m2 K)], [W s/(m3 K)]

    Returns
    -------
    float or numpy.ndarray
        The yardstick ``dT_open``. [K]

    Notes
    -----
    Heat balance per unit module area: absorbed irradiance minus converted power leaves as
    heat, ``U * (T - temp_air)``. An open module converts nothing, so it runs warmer by the
    converted power density ``eta_op * G`` divided by ``U`` (the same difference the PVsyst
    cell-temperature model gives between ``module_efficiency = 0`` and ``eta_op``).

    References
    ----------
    .. [1] D. Faiman, Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    """
    eta = efficiency if temp_module is None else efficiency * _temp_factor(gamma_pmax_pct_per_k, temp_module)
    return eta * np.asarray(poa_global, dtype=float) / np.asarray(faiman_u(wind_speed, u0, u1))


def bypass_loss(pmax_w: float, bypass_diodes: int, k: int = 1) -> float:
    """STC power lost when ``k`` of ``bypass_diodes`` substrings are bypassed, ``k * pmax / n``. [W]

    Notes
    -----
    The substrings are equal and in series; a bypassed substring contributes no voltage
    (strictly a small negative one, the diode's forward drop, about 0.4-0.7 V: from memory),
    so the module keeps ``(n - k) / n`` of its maximum power (common practice).
    """
    n = max(int(bypass_diodes), 1)
    k = min(max(int(k), 0), n)
    return float(pmax_w) * k / n


def thermal_deficit_fraction(delta_t_k: ArrayLike, yardstick_k: ArrayLike) -> FloatArray:
    """Share of operating power lost, ``clip(delta_t_k / yardstick_k, 0, 1)``. [-]

    NaN where either input is NaN or the yardstick is not positive.
    """
    dt = np.asarray(delta_t_k, dtype=float)
    ys = np.asarray(yardstick_k, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.where(ys > 0, dt / ys, np.nan)
    return np.clip(f, 0.0, 1.0)


def lateral_spread_m(wind_speed: Any, sheet_conductance_w_k: float, *, u0: float, u1: float) -> Any:
    """Lateral conduction length of the module laminate, ``sqrt(k t / U(v))``. [m]

    Parameters
    ----------
    wind_speed : float or array-like
        Wind speed. [m/s]
    sheet_conductance_w_k : float
        In-plane conductance of the laminate, sum of ``k * thickness`` of its layers. [W/K]
    u0, u1 : float
        Faiman coefficients. [W/(m2 K)], [W s/(m3 K)]

    Notes
    -----
    Outside a region held ``dT`` above its surroundings the laminate behaves as a thin fin
    losing heat to both faces with ``U``: the excess decays as ``exp(-x / L)`` with this
    length ``L``, and the heat leaving the halo per metre of region edge is
    ``U * dT * L`` (the infinite-fin result ``sqrt(h P k A) * theta_b``).

    References
    ----------
    .. [1] F. P. Incropera, D. P. DeWitt et al., "Fundamentals of Heat and Mass Transfer",
       6th ed., Wiley, 2007, section 3.6.2 (fin of infinite length).
    """
    return np.sqrt(float(sheet_conductance_w_k) / np.asarray(faiman_u(wind_speed, u0, u1)))


def heat_balance_loss(delta_t_k: Any, area_m2: Any, wind_speed: Any, *, u0: float, u1: float,
                      perimeter_m: Any = 0.0, sheet_conductance_w_k: float = 0.0) -> Any:
    """Extra heat leaving a warm region and its conduction halo, ``U(v) * dT * (A + P * L)``. [W]

    Parameters
    ----------
    delta_t_k : float or array-like
        Region temperature above the local reference (negative values give 0). [K]
    area_m2 : float or array-like
        Region area. [m2]
    wind_speed : float or array-like
        Wind speed. [m/s]
    u0, u1 : float
        Faiman coefficients. [W/(m2 K)], [W s/(m3 K)]
    perimeter_m : float or array-like
        Length of the region's edges inside the module (edges on the module frame do not
        count). [m]
    sheet_conductance_w_k : float
        In-plane conductance of the laminate for the halo, see :func:`lateral_spread_m`;
        0 ignores the halo. [W/K]

    Returns
    -------
    float or numpy.ndarray
        Dissipated power at the flight's irradiance. [W]

    Notes
    -----
    The region statistic of spot patterns is a 95th percentile, and real spots are not
    uniform, so this is an estimate; it is bounded by the power of the substrings involved
    where it is used (:func:`estimate_loss`).

    References
    ----------
    .. [1] D. Faiman, Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
    .. [2] F. P. Incropera, D. P. DeWitt et al., "Fundamentals of Heat and Mass Transfer",
       6th ed., Wiley, 2007, section 3.6.2.
    """
    dt = np.clip(np.asarray(delta_t_k, dtype=float), 0.0, None)
    halo = np.asarray(perimeter_m, dtype=float) * (
        lateral_spread_m(wind_speed, sheet_conductance_w_k, u0=u0, u1=u1) if sheet_conductance_w_k > 0 else 0.0)
    return np.asarray(faiman_u(wind_speed, u0, u1)) * (np.asarray(area_m2, dtype=float) + halo) * dt


def region_inner_perimeter_m(region_uv: ArrayLike | None, length_m: float, width_m: float) -> float:
    """Length of the edges of the union of local boxes that lie inside the module. [m]

    Edges on the module's outline (``u`` or ``v`` = 0 or 1) are left out: the frame, not the
    laminate, lies beyond them. No boxes (the whole module) gives 0.
    """
    boxes = _boxes(region_uv)
    if not boxes:
        return 0.0
    import shapely
    from shapely.geometry import box

    region = shapely.union_all([box(u0 * length_m, v0 * width_m, u1 * length_m, v1 * width_m)
                                for u0, u1, v0, v1 in boxes])
    outline = box(0.0, 0.0, length_m, width_m).exterior.buffer(1e-9)
    return float(region.boundary.difference(outline).length)


def _boxes(region_uv: ArrayLike | None) -> list[tuple[float, float, float, float]]:
    if region_uv is None or (isinstance(region_uv, float) and math.isnan(region_uv)):
        return []
    arr = np.asarray(region_uv, dtype=float)
    if arr.size == 0:
        return []
    out = []
    for u0, u1, v0, v1 in arr.reshape(-1, 4):
        u0, u1 = sorted((float(np.clip(u0, 0, 1)), float(np.clip(u1, 0, 1))))
        v0, v1 = sorted((float(np.clip(v0, 0, 1)), float(np.clip(v1, 0, 1))))
        out.append((u0, u1, v0, v1))
    return out


def region_area_fraction(region_uv: ArrayLike | None) -> float:
    """Share of the module area covered by the union of local boxes ``(u0, u1, v0, v1)``. [-]

    No boxes means the whole module (1.0).
    """
    boxes = _boxes(region_uv)
    if not boxes:
        return 1.0
    import shapely
    from shapely.geometry import box

    return float(shapely.union_all([box(u0, v0, u1, v1) for u0, u1, v0, v1 in boxes]).area)


def substrings_touched(region_uv: ArrayLike | None, bypass_diodes: int) -> int:
    """Number of bypass-diode substrings (strips ``floor(v * n)``) the boxes overlap. [-]

    No boxes means all ``n`` substrings. Box edges within 1e-6 of a substring border do not
    count as touching the neighbour.
    """
    n = max(int(bypass_diodes), 1)
    boxes = _boxes(region_uv)
    if not boxes:
        return n
    touched: set[int] = set()
    for _, _, v0, v1 in boxes:
        k0 = int(math.floor(v0 * n + 1e-6))
        k1 = int(math.ceil(v1 * n - 1e-6))
        touched.update(range(max(k0, 0), min(max(k1, k0 + 1), n)))
    return max(len(touched), 1)


# --------------------------------------------------------------------------- per anomaly


def _get(obj: Any, *names: str, default: Any = None) -> Any:
    for n in names:
        if isinstance(obj, Mapping):
            if n in obj and obj[n] is not None:
                return obj[n]
        elif getattr(obj, n, None) is not None:
            return getattr(obj, n)
    return default


def _conditions_at(conditions: Any, i: int) -> tuple[float, float, float]:
    """(poa_global [W/m2], temp_air [degC], wind_speed [m/s]) of module ``i``; NaN when unknown."""
    if conditions is None:
        return (math.nan, math.nan, math.nan)
    if isinstance(conditions, pd.DataFrame):
        row = conditions.iloc[i] if 0 <= i < len(conditions) else {}
        vals = [row.get(c, math.nan) if hasattr(row, "get") else math.nan for c in
                ("poa_global", "temp_air", "wind_speed")]
    else:
        vals = [_get(conditions, "poa_global", "poa_irradiance_w_m2", default=math.nan),
                _get(conditions, "temp_air", "ambient_c", default=math.nan),
                _get(conditions, "wind_speed", "wind_m_s", default=math.nan)]
    out = []
    for v in vals:
        try:
            out.append(float(v))
        except (TypeError, ValueError):
            out.append(math.nan)
    return tuple(out)  # type: ignore[return-value]


def _indices(row: Mapping[str, Any]) -> list[int]:
    idx = row.get("module_indices")
    if idx is None or (isinstance(idx, float) and math.isnan(idx)):
        idx = []
    idx = [int(i) for i in np.asarray(idx).ravel()] if len(np.atleast_1d(idx)) else []
    first = row.get("module_index")
    if first is not None and not (isinstance(first, float) and math.isnan(first)):
        if int(first) not in idx:
            idx = [int(first)] + idx
    return idx


def _n_substrings(row: Mapping[str, Any], n: int) -> int:
    for col in ("n_substrings", "substrings"):
        v = row.get(col)
        if v is not None and not (isinstance(v, float) and math.isnan(v)):
            try:
                return min(max(int(len(v) if isinstance(v, (list, tuple, np.ndarray)) else v), 1), n)
            except (TypeError, ValueError):
                pass
    if _boxes(row.get("region_uv")):
        return substrings_touched(row.get("region_uv"), n)
    return 1 if row.get("defect") == "bypassed_substring" else min(2, n)


def estimate_loss(anomalies: pd.DataFrame, module_spec: Any, conditions: Any = None, site: Any = None,
                  settings: Mapping | None = None, *, modules: Any = None, layout: Any = None,
                  lonlat: tuple[float, float] | None = None,
                  specific_yield_kwh_per_kwp: float | None = None,
                  stats: Any = None, reference_c: ArrayLike | None = None) -> pd.DataFrame:
    """Power and energy loss of every anomaly.

    Parameters
    ----------
    anomalies : pandas.DataFrame
        Classified anomalies (DEVELOPERS.md): ``module_index``, ``module_indices``,
        ``defect``, ``region``, ``region_uv``, ``delta_t_k`` [K].
    module_spec : ModuleSpec
        ``pmax_w`` [W], ``gamma_pmax_pct_per_k`` [%/K], ``bypass_diodes``, ``width_m``,
        ``length_m`` [m] (``area_m2`` and ``efficiency`` used when present).
    conditions : pandas.DataFrame or mapping, optional
        Per-module conditions aligned with the modules (``poa_global`` [W/m2], ``temp_air``
        [degC], ``wind_speed`` [m/s]), or one set of constants (those names or the manifest's
        ``poa_irradiance_w_m2``, ``ambient_c``, ``wind_m_s``). Without irradiance the
        thermal estimators give NaN; the electrical rules still give STC losses.
    site : Site, optional
        ``specific_yield_kwh_per_kwp`` [kWh/kWp/yr], ``tariff_per_kwh``, ``currency``.
    settings : mapping, optional
        The pipeline (sections ``[loss]``: ``energy_derate``, ``albedo``, ``yield_year``,
        ``linke_turbidity``, ``sheet_conductance_w_k``; ``[heat]``: ``u0``, ``u1``) or its
        ``[loss]`` section alone; keys left out take the defaults of the pipeline file.
    modules : geopandas.GeoDataFrame, optional
        The modules frame: its centroid places the clear-sky year when the site has no
        specific yield (unless ``lonlat`` is given).
    lonlat : (float, float), optional
        WGS84 longitude and latitude of the site for the clear-sky year. [deg]
    layout : LayoutSpec, optional
        ``tilt_deg``, ``azimuth_deg`` of the plane of array [deg] for the clear-sky year.
    specific_yield_kwh_per_kwp : float, optional
        Overrides both the manifest value and the clear-sky estimate. [kWh/kWp/yr]
    stats : ZonalStats, optional
        True-temperature statistics; with ``reference_c`` their ``cell_p95`` grid gives
        each box of a multi-box spot region (``several_hot_cells``) its own rise, so cooler
        cells of a cluster are not counted at the hottest cell's rise.
    reference_c : array-like, optional
        Local reference temperature of every module (aligned with the modules). [degC]

    Returns
    -------
    pandas.DataFrame
        A copy with ``power_loss_w`` (STC) [W], ``power_loss_w_flight`` [W],
        ``loss_fraction`` (of the affected modules' power) [-], ``loss_method``,
        ``energy_loss_kwh_per_year`` [kWh/yr] and, with a tariff, ``yearly_cost`` and
        ``currency``. ``attrs["specific_yield_kwh_per_kwp"]`` and
        ``attrs["specific_yield_source"]`` record the yield used.

    Notes
    -----
    An anomaly's loss never exceeds the nameplate of its modules; an ``open_string``
    carries the run's total, split over its modules by :func:`module_losses`.
    """
    cfg = section(settings, "loss")
    heat = Faiman.from_settings(section(settings, "heat"))
    out = anomalies.copy()
    n_an = len(out)
    pmax = float(_get(module_spec, "pmax_w"))
    n_sub = int(_get(module_spec, "bypass_diodes", default=3))
    gamma = float(_get(module_spec, "gamma_pmax_pct_per_k", default=-0.35))
    length_m = float(_get(module_spec, "length_m", default=math.nan))
    width_m = float(_get(module_spec, "width_m", default=math.nan))
    area = _get(module_spec, "area_m2")
    area = float(area) if area is not None else width_m * length_m
    eta = _get(module_spec, "efficiency")
    eta = float(eta) if eta is not None else pmax / (1000.0 * area)
    u0, u1 = heat.u0, heat.u1
    cell_p95 = getattr(stats, "cell_p95", None) if stats is not None and reference_c is not None else None
    ref_c = np.asarray(reference_c, dtype=float) if reference_c is not None else None
    table = getattr(stats, "table", None) if stats is not None else None
    t_mean: np.ndarray | None = None
    t_median: np.ndarray | None = None
    if table is not None and "t_mean_c" in table and "t_median_c" in table:
        t_mean = np.asarray(table["t_mean_c"], dtype=np.float64)
        t_median = np.asarray(table["t_median_c"], dtype=np.float64)

    stc = np.full(n_an, np.nan)
    flight = np.full(n_an, np.nan)
    frac = np.full(n_an, np.nan)
    shares: list[list[float] | None] = []  # each module's own STC loss where they differ [W]
    methods: list[str] = []
    for pos, (_, row) in enumerate(out.iterrows()):
        idx = _indices(row)
        m = max(len(idx), 1)
        defect = row.get("defect")
        method = DEFECT_METHOD.get(defect) or _REGION_METHOD.get(row.get("region"), "thermal_deficit")
        shares_row: list[float] | None = None
        g, ta, ws = _conditions_at(conditions, idx[0] if idx else -1)
        t_mod = float(heat.temperature(g, ta, ws)) if np.isfinite(ta) else np.nan
        tf = float(_temp_factor(gamma, t_mod)) if np.isfinite(t_mod) else 1.0
        p_op = pmax * g / 1000.0 * tf if np.isfinite(g) and g > 0 else np.nan  # one module [W]
        dt = row.get("delta_t_k")
        dt = float(dt) if dt is not None and not pd.isna(dt) else np.nan
        if method == "electrical_rule":
            if defect in ("open_module", "open_string"):
                f = 1.0
            else:
                k = 1 if defect == "bypassed_substring" else _n_substrings(row, n_sub)
                f = bypass_loss(pmax, n_sub, k) / pmax
            frac[pos] = f
            stc[pos] = f * pmax * m
            flight[pos] = f * p_op * m
        elif method == "thermal_deficit":
            ys = open_module_yardstick(g, ws, eta, t_mod if np.isfinite(t_mod) else None, gamma, u0=u0, u1=u1) \
                if np.isfinite(g) and g > 0 and np.isfinite(ws) else np.nan
            fs = None
            if t_mean is not None and t_median is not None and idx and np.isfinite(ys) and np.isfinite(dt):
                # heat balance per module: the heat added is U x area x the *mean* rise over the
                # module; a patchy pattern's median (delta_t_k, taken against the anomaly's own
                # reference) under-reads it by the module's mean - median. Over a run of modules
                # (a PID string) each module's own rise: its median's excess over the run's
                # median (delta_t_k) plus its own mean - median
                own = t_median[idx] - np.nanmedian(t_median[idx]) if m > 1 else np.zeros(len(idx))
                rises = dt + np.nan_to_num(own) + (t_mean[idx] - t_median[idx])
                fs = np.asarray(thermal_deficit_fraction(rises, ys), dtype=float)
                fs = np.where(np.isfinite(fs), fs, float(thermal_deficit_fraction(dt, ys)))
                f = float(np.mean(fs))
            else:
                f = float(thermal_deficit_fraction(dt, ys))
            if fs is not None and m > 1 and np.isfinite(fs).all():
                shares_row = [float(v) * pmax for v in fs]
            frac[pos] = f
            stc[pos] = f * pmax * m
            flight[pos] = f * p_op * m
        else:  # heat balance
            region_area = region_area_fraction(row.get("region_uv")) * area
            perim = region_inner_perimeter_m(row.get("region_uv"), length_m, width_m)
            if cell_p95 is not None and ref_c is not None and idx:
                dt_boxes = _mean_box_rise(cell_p95, ref_c, idx[0], row.get("region_uv"))
                if np.isfinite(dt_boxes):
                    dt = dt_boxes
            q = float(heat_balance_loss(dt, region_area, ws, u0=u0, u1=u1, perimeter_m=perim,
                                        sheet_conductance_w_k=float(cfg["sheet_conductance_w_k"]))) \
                if np.isfinite(ws) else np.nan
            k = substrings_touched(row.get("region_uv"), n_sub)
            cap = bypass_loss(pmax, n_sub, k) / pmax  # share of one module
            f = min(q / p_op, cap) if np.isfinite(q) and np.isfinite(p_op) and p_op > 0 else np.nan
            frac[pos] = f
            stc[pos] = f * pmax * m
            flight[pos] = f * p_op * m
        methods.append(method)
        shares.append(shares_row if method == "thermal_deficit" and shares_row is not None else None)

    out["power_loss_w"] = stc
    out["power_loss_w_flight"] = flight
    out["loss_fraction"] = frac
    out["loss_method"] = pd.Series(methods, index=out.index, dtype=object)
    out["module_power_loss_w"] = pd.Series(shares, index=out.index, dtype=object)

    sy, source = site_yield(site, modules, layout, settings, specific_yield_kwh_per_kwp, lonlat)
    out["energy_loss_kwh_per_year"] = stc / 1000.0 * sy if sy is not None else np.nan
    tariff = _get(site, "tariff_per_kwh") if site is not None else None
    if tariff is not None:
        out["yearly_cost"] = out["energy_loss_kwh_per_year"] * float(tariff)
        out["currency"] = _get(site, "currency")
    if {"severity", "defect", "delta_t_norm_k", "t_max_c"} <= set(out.columns):
        # severity rules that depend on the loss (a PID string's total) take it into account
        out = assign_severity(out, section(settings, "severity"))
    out.attrs["specific_yield_kwh_per_kwp"] = sy
    out.attrs["specific_yield_source"] = source
    log.debug("loss of %d anomalies; specific yield %s kWh/kWp/yr (%s)", n_an, sy, source)
    return out


def _mean_box_rise(cell_p95: np.ndarray, reference_c: np.ndarray, i: int, region_uv: ArrayLike | None) -> float:
    """Area-weighted mean rise of a multi-box region over ``reference_c[i]``, from cell p95s. [K]

    Each box's rise is the median of the 95th percentiles of the cells it covers minus the
    module's reference. NaN for fewer than two boxes (the anomaly's own ``delta_t_k`` is
    then the region's statistic) or when no box has data.
    """
    boxes = _boxes(region_uv)
    if len(boxes) < 2 or not 0 <= i < len(cell_p95) or not np.isfinite(reference_c[i]):
        return math.nan
    na, nc = cell_p95.shape[1], cell_p95.shape[2]
    rises, weights = [], []
    for u0, u1, v0, v1 in boxes:
        a0 = int(math.floor(u0 * na + 1e-6))
        a1 = max(int(math.ceil(u1 * na - 1e-6)), a0 + 1)
        c0 = int(math.floor(v0 * nc + 1e-6))
        c1 = max(int(math.ceil(v1 * nc - 1e-6)), c0 + 1)
        vals = cell_p95[i, max(a0, 0):min(a1, na), max(c0, 0):min(c1, nc)]
        vals = vals[np.isfinite(vals)]
        if vals.size:
            rises.append(max(float(np.median(vals)) - float(reference_c[i]), 0.0))
            weights.append((u1 - u0) * (v1 - v0))
    if not rises or sum(weights) <= 0:
        return math.nan
    return float(np.average(rises, weights=weights))


def module_losses(anomalies: pd.DataFrame, n_modules: int, pmax_w: float | None = None) -> pd.DataFrame:
    """Each module's own share of the anomalies' losses.

    An anomaly over ``m`` modules gives each of them ``1/m`` of its losses (exact for an
    open string, whose modules each lose their nameplate), or, when it lists each module's
    own STC loss (``module_power_loss_w``, a PID string whose modules lose more near the
    negative end), a share in proportion to it. A module's shares are summed and,
    given ``pmax_w``, capped at the nameplate (several anomalies on one module cannot lose
    more than the module makes), so the plant total never double counts.

    Returns
    -------
    pandas.DataFrame
        Index ``0..n_modules-1``; columns ``power_loss_w`` [W] (STC), ``power_loss_w_flight``
        [W] and ``energy_loss_kwh_per_year`` [kWh/yr]. NaN losses count as 0.
    """
    cols = ("power_loss_w", "power_loss_w_flight", "energy_loss_kwh_per_year")
    acc = np.zeros((n_modules, len(cols)))
    for _, row in anomalies.iterrows():
        idx = [i for i in _indices(row) if 0 <= i < n_modules]
        if not idx:
            continue
        weights = np.full(len(idx), 1.0 / len(idx))
        own = row.get("module_power_loss_w") if "module_power_loss_w" in anomalies.columns else None
        if isinstance(own, (list, tuple, np.ndarray)) and len(own) == len(_indices(row)) == len(idx):
            own_w = np.clip(np.asarray(own, dtype=float), 0.0, None)
            if np.isfinite(own_w).all() and own_w.sum() > 0:
                weights = own_w / own_w.sum()
        for c, col in enumerate(cols):
            v = row.get(col) if col in anomalies.columns else None
            v = float(v) if v is not None and not pd.isna(v) else 0.0
            for i, wgt in zip(idx, weights):
                acc[i, c] += v * wgt
    if pmax_w is not None:
        over = acc[:, 0] > pmax_w
        scale = np.where(over, pmax_w / np.where(acc[:, 0] > 0, acc[:, 0], 1.0), 1.0)
        acc *= scale[:, None]
    return pd.DataFrame(acc, columns=list(cols))
