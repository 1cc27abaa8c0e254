"""Validity of a flight: checks that can fail it.

Acquisition limits of IEC TS 62446-3 (irradiance, wind, irradiance change, clouds, pixels
per cell; :func:`check_validity`) and the checks of the measurement itself, added by the
pipeline once it knows them (:func:`with_checks`):

- ``registration``: the layout sits on the modules of the ortho
  (:func:`registration_check`, from the module evidence of :mod:`pvscan.measure.register`);
- ``coverage``: the share of layout modules without usable pixels (:func:`coverage_check`);
- ``plausibility``: the modules' true temperatures against what the Faiman model predicts
  from irradiance, air temperature and wind (:func:`plausibility_check`);
- ``row_shading``: the share of a fixed-tilt row that the row in front of it shades during
  the flight, from the sun's position and the rows' geometry in the layout
  (:func:`row_shading_check`): a shaded strip reads as a cool or a bypassed band on
  healthy modules.

The checks of what the classification measured about the flight as a whole (``string_reference``,
``module_spread``, ``row_cluster``, ``row_edge``, ``unexplained_pid*``, ``cold_run``) live in
:mod:`pvscan.measure.evidence_checks` and are importable from here too; the check record they all
share in :mod:`pvscan.measure.checks`.

Every check is a dict ``name, value, limit, kind ("min" | "max"), unit, passed (None when
unknown), source, message``; ``Validity.ok`` is false when any check failed.
"""
from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from pvscan.errors import ValidityWarning

if TYPE_CHECKING:
    from pvscan.io.manifest import ModuleSpec
    from pvscan.measure.conditions import FlightConditions

from pvscan.measure.checks import Check
from pvscan.measure.checks import make_check as _check
from pvscan.measure.checks import validity_settings as _validity_settings
from pvscan.measure.evidence_checks import (
    cold_run_check,
    evidence_checks,
    module_spread_check,
    row_cluster_check,
    row_edge_check,
    string_reference_check,
    unexplained_pid_check,
    unexplained_pid_pattern_check,
    unexplained_pid_tail_check,
)
from pvscan.measure.layout_image.coverage import detected_layout_check

__all__ = ["Validity", "check_validity", "registration_check", "coverage_check", "plausibility_check",
           "row_geometry", "row_shading_check", "string_reference_check", "unexplained_pid_check",
           "unexplained_pid_pattern_check", "unexplained_pid_tail_check", "row_edge_check", "module_spread_check",
           "row_cluster_check", "cold_run_check", "evidence_checks", "with_checks", "detected_layout_check"]

logger = logging.getLogger(__name__)


def _settings(settings: Mapping[str, Any] | None) -> Mapping[str, Any]:
    from pvscan.io.settings import section

    return section(settings, "conditions")


@dataclass(frozen=True)
class Validity:
    """Validity of a flight: acquisition limits and the checks of its measurement.

    Attributes
    ----------
    checks : tuple of dict
        One per check: ``name``, ``value``, ``limit``, ``kind`` (``"min"`` or ``"max"``),
        ``unit``, ``passed`` (None when the value is unknown), ``source``.
    confidence_factor : float
        0..1; 1 when every known check passes. Each failed check multiplies it by how far
        the value is from its limit (``value/limit`` for a minimum, ``limit/value`` for a
        maximum), and the product is floored at ``confidence_floor`` of the pipeline. A
        design choice: a flight at 540 W/m2 (limit 600) keeps 0.9 of its confidence.
    """

    checks: tuple[Check, ...] = field(default_factory=tuple)
    confidence_factor: float = 1.0

    @property
    def ok(self) -> bool:
        """True when no known check failed."""
        return not self.failed

    @property
    def failed(self) -> list[str]:
        """Names of the failed checks."""
        return [c["name"] for c in self.checks if c["passed"] is False]

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping for summary.json."""
        return {
            "ok": self.ok,
            "failed": self.failed,
            "confidence_factor": self.confidence_factor,
            "checks": [dict(c) for c in self.checks],
            "note": ("Acquisition limits of IEC TS 62446-3 for outdoor thermography, and checks that the "
                     "layout sits on the modules (registration), that the modules were imaged (coverage) "
                     "and that their temperatures fit the conditions (plausibility); a failed check lowers "
                     "the confidence of every finding of this flight, a failed registration to the floor."),
        }


def _factor(c: Mapping[str, Any]) -> float:
    if c["passed"] is not False:
        return 1.0
    v, lim = c["value"], c["limit"]
    if c["kind"] == "min":
        return max(v, 0.0) / lim if lim > 0 else 0.0
    return lim / v if v > 0 else 0.0


def check_validity(conditions: FlightConditions, module_conditions: pd.DataFrame | None = None, *,
                   gsd_m: float | None = None, module_spec: ModuleSpec | None = None,
                   cell_size_m: float | None = None, cloud_okta: float | None = None,
                   settings: Mapping[str, Any] | None = None) -> Validity:
    """Check a flight against the acquisition conditions for outdoor thermography.

    Checks (limits from the ``[conditions]`` pipeline section, each with its source):

    - ``irradiance_min``: lowest plane-of-array irradiance during the flight (and at any
      module's imaging time) >= ``min_irradiance_w_m2`` (600 W/m2, IEC TS 62446-3);
    - ``wind_max``: highest wind speed <= ``max_wind_m_s`` (28 km/h ~ 4 Bft, IEC TS
      62446-3, from memory);
    - ``irradiance_change``: (max - min) / mean of the irradiance during the flight <=
      ``max_irradiance_change_pct`` (from memory);
    - ``cloud_cover``: cloud cover <= ``max_cloud_okta`` (IEC TS 62446-3, from memory),
      when known;
    - ``pixels_per_cell``: cell edge / ground sampling distance >= ``min_px_per_cell``
      (detailed inspection, from memory), when the GSD is known.

    Parameters
    ----------
    conditions : FlightConditions
        From :func:`flight_conditions`.
    module_conditions : pandas.DataFrame, optional
        From :func:`module_conditions`; its lowest ``poa_global`` and highest
        ``wind_speed`` enter the checks too.
    gsd_m : float, optional
        Ground sampling distance of the ortho [m/px].
    module_spec : pvscan.io.manifest.ModuleSpec, optional
        For the cell size: the shorter of ``width_m / n_across`` and ``length_m / n_along``.
    cell_size_m : float, optional
        Cell edge [m]; overrides ``module_spec``.
    cloud_okta : float, optional
        Cloud cover [okta]; overrides the series.
    settings : Mapping, optional
        The ``[conditions]`` pipeline section.

    Returns
    -------
    Validity
        A failed check is logged (level WARNING); a :class:`~pvscan.errors.ValidityWarning`
        is issued too when the section's ``warn`` is true (default false: the result
        records every check).
    """
    st = _settings(settings)
    poa_min = conditions.poa_global_min
    wind_max = conditions.wind_speed_max
    if module_conditions is not None and len(module_conditions):
        poa_min = min(poa_min, float(np.nanmin(module_conditions["poa_global"].to_numpy(float))))
        wind_max = max(wind_max, float(np.nanmax(module_conditions["wind_speed"].to_numpy(float))))
    if cell_size_m is None and module_spec is not None:
        cell_size_m = min(module_spec.width_m / module_spec.n_across, module_spec.length_m / module_spec.n_along)
    px = cell_size_m / gsd_m if (cell_size_m is not None and gsd_m) else None
    cloud = cloud_okta if cloud_okta is not None else conditions.cloud_okta
    checks = (
        _check("irradiance_min", poa_min, st["min_irradiance_w_m2"], "min", "W/m2", "IEC TS 62446-3"),
        _check("wind_max", wind_max, st["max_wind_m_s"], "max", "m/s", "IEC TS 62446-3 (from memory)"),
        _check("irradiance_change", conditions.poa_global_change_pct, st["max_irradiance_change_pct"], "max", "%",
               "from memory"),
        _check("cloud_cover", cloud, st["max_cloud_okta"], "max", "okta", "IEC TS 62446-3 (from memory)"),
        _check("pixels_per_cell", px, st["min_px_per_cell"], "min", "px",
               "IEC TS 62446-3 detailed inspection (from memory)"),
    )
    factor = 1.0
    for c in checks:
        factor *= _factor(c)
    if any(c["passed"] is False for c in checks):
        factor = max(factor, float(st["confidence_floor"]))
    v = Validity(checks=checks, confidence_factor=float(factor))
    if not v.ok:
        msg = "; ".join(f"{c['name']} {c['value']:.4g} {c['unit']} (limit {c['limit']:g})"
                        for c in checks if c["passed"] is False)
        logger.warning("flight outside acquisition limits: %s", msg)
        if st.get("warn", False):
            warnings.warn(f"flight outside acquisition limits: {msg}", ValidityWarning, stacklevel=2)
    return v


def registration_check(reg: Any, settings: Mapping | None = None) -> dict:
    """``registration``: the worse probe ratio of the placement used (at most
    ``[register] evidence_max_ratio``); failed when the registration found no placement that
    sits on the modules, or when the placement is ``ambiguous``: one a module pitch away fits
    almost as well, or a table's local correction reached the edge of its search
    (``[register] local_radius_m``). The message says what was measured."""
    from pvscan.io.settings import section

    lim = float(section(settings, "register")["evidence_max_ratio"])
    status = getattr(reg, "status", "")
    ev = getattr(reg, "evidence", {}) or {}
    used = (ev.get("chosen") or ev.get("drawn")) if getattr(reg, "applied", False) else ev.get("drawn")
    if status == "failed":
        cands = [v for v in [ev.get("drawn"), *(ev.get("proposals") or [])] if v]
        used = min(cands, key=lambda q: max(q.get("ratio_u") or 9, q.get("ratio_v") or 9)) if cands else None
    value = None
    if used and used.get("ratio_u") is not None and used.get("ratio_v") is not None:
        value = max(float(used["ratio_u"]), float(used["ratio_v"]))
    c = _check("registration", value, lim, "max", "", "module evidence (pvscan.measure.register; calibrated)",
               message=f"registration: {getattr(reg, 'message', '') or status}")
    if status == "ok" and used and used.get("ok") is True:
        # the footprints shown on their modules module by module (minimum shares), not by the ratios
        c["passed"] = True
    if status in ("failed", "ambiguous"):
        # failed: no placement sits on the modules; ambiguous: one a module pitch away fits
        # almost as well (findings may sit on the neighbouring module), or a table needed a
        # correction as large as its local search allows
        c["passed"] = False
    elif status in ("", "not_run"):
        c["passed"] = None
    return c


def coverage_check(valid_fraction: np.ndarray, settings: Mapping | None = None) -> dict:
    """``coverage``: share of the layout's modules without usable pixels [%] (at most
    ``[validity] max_modules_without_data_pct``); a module is without usable pixels when
    less than ``[validity] usable_valid_fraction`` of its footprint was valid."""
    st = _validity_settings(settings)
    vf = np.asarray(valid_fraction, float)
    n = len(vf)
    missing = int(np.count_nonzero(~(vf >= float(st["usable_valid_fraction"])))) if n else 0
    pct = 100.0 * missing / n if n else float("nan")
    lim = float(st["max_modules_without_data_pct"])
    msg = f"coverage: {missing:,} of {n:,} modules ({pct:.1f} %) without usable pixels (at most {lim:g} %)"
    c = _check("coverage", pct, lim, "max", "%", "common practice", message=msg)
    c["modules_without_data"] = missing
    return c


def plausibility_check(temp_module: np.ndarray, temp_predicted: np.ndarray, settings: Mapping | None = None) -> dict:
    """``plausibility``: median |measured - predicted| of the modules' true temperature [K].

    ``temp_module``: the modules' median true temperature [degC]; ``temp_predicted``: the
    Faiman temperature at each module's conditions [degC]
    (:func:`pvscan.physics.heat.faiman_temperature`). The median over modules keeps the
    few defective ones out; a units or scale mix-up moves all of them.
    """
    st = _validity_settings(settings)
    d = np.asarray(temp_module, float) - np.asarray(temp_predicted, float)
    d = d[np.isfinite(d)]
    med = float(np.median(d)) if len(d) else float("nan")
    lim = float(st["plausibility_max_k"])
    msg = (f"plausibility: modules read {med:+.1f} K against the Faiman temperature at the flight's conditions "
           f"(at most {lim:g} K apart)" if math.isfinite(med) else "plausibility: no module to compare")
    c = _check("plausibility", abs(med) if math.isfinite(med) else None, lim, "max", "K",
               "Faiman 2008 heat balance; limit from memory", message=msg)
    c["median_difference_k"] = med if math.isfinite(med) else None
    return c


def row_geometry(modules: Any, azimuth_deg: float) -> tuple[float, float | None]:
    """Plan depth of the tables and the spacing of their rows [m], from the layout.

    Every vertex of the module footprints is projected on the direction the modules face
    (``azimuth_deg``, degrees from north, clockwise; map x east, y north). A table's plan
    depth is the extent of its vertices along that direction; a row's position, the middle of
    that extent. Returns ``(median plan depth, median step between neighbouring rows)``; the
    step is None when the layout holds a single row (nothing in front of it).
    """
    import shapely

    geoms = modules.geometry.to_numpy()
    if len(geoms) == 0:
        return float("nan"), None
    az = math.radians(float(azimuth_deg))
    coords, idx = shapely.get_coordinates(geoms, return_index=True)
    along = coords @ np.array([math.sin(az), math.cos(az)])
    tables = modules["table_id"].astype(str).to_numpy()[idx]
    ext = pd.DataFrame({"table": tables, "s": along}).groupby("table")["s"].agg(["min", "max"])
    depth = float(np.median(ext["max"] - ext["min"]))
    mids = np.sort(((ext["max"] + ext["min"]) / 2.0).to_numpy(float))
    steps = np.diff(mids)
    # tables of one row share their position; a step of more than half a table is a new row
    steps = steps[steps > 0.5 * depth]
    return depth, (float(np.median(steps)) if len(steps) else None)


def row_shading_check(modules: Any, tilt_deg: float, azimuth_deg: float, lon: float, lat: float,
                      times: Any, settings: Mapping | None = None) -> dict:
    """``row_shading``: the largest share of a row's slant width that the row in front of it
    shades at any of ``times`` [-] (at most ``[validity] max_row_shaded_fraction``).

    The sun's position is pvlib's (NREL SPA) at the site (``lon``, ``lat`` [deg]); the shaded
    share is pvlib's ``shading.shaded_fraction1d`` (Anderson and Jensen 2024) for rows tilted
    ``tilt_deg`` toward ``azimuth_deg`` with the collector width and pitch of the layout
    (:func:`row_geometry`: the plan depth over cos(tilt), the median row step). Thermography
    needs the imaged modules unshaded (IEC TS 62446-3, from memory): a shaded strip on healthy
    modules reads as a cool band or a bypassed substring. Unknown (passes) when the layout
    holds one row; 0 for horizontal rows, which do not shade each other.
    """
    import pvlib

    st = _validity_settings(settings)
    lim = float(st["max_row_shaded_fraction"])
    src = "IEC TS 62446-3 (modules unshaded, from memory); pvlib.shading.shaded_fraction1d"
    depth, pitch = row_geometry(modules, azimuth_deg)
    tilt = float(tilt_deg)
    if pitch is None or not math.isfinite(depth) or not 0.0 <= tilt < 85.0:
        return _check("row_shading", None, lim, "max", "", src,
                      message="row shading: unknown (a single row, or no row geometry in the layout)")
    width = depth / math.cos(math.radians(tilt))
    idx = pd.DatetimeIndex([pd.Timestamp(t) for t in times])
    sp = pvlib.solarposition.get_solarposition(idx, lat, lon)
    frac = pvlib.shading.shaded_fraction1d(sp["apparent_zenith"].to_numpy(float), sp["azimuth"].to_numpy(float),
                                           (float(azimuth_deg) - 90.0) % 360.0, tilt,
                                           collector_width=width, pitch=pitch)
    frac = np.asarray(frac, float)
    worst = round(float(np.nanmax(frac)), 4) if np.isfinite(frac).any() else float("nan")
    elev = float(np.min(90.0 - sp["apparent_zenith"].to_numpy(float)))
    if math.isfinite(worst):
        msg = (f"row shading: up to {100 * worst:.0f} % of each row's width in the shade of the row in front "
               f"(sun down to {elev:.0f} deg; rows {pitch:.2f} m apart, {width:.2f} m wide at {tilt:g} deg; "
               f"at most {100 * lim:g} %)")
    else:
        msg = "row shading: unknown"
    c = _check("row_shading", worst, lim, "max", "", src, message=msg)
    c.update({"pitch_m": round(pitch, 3), "collector_width_m": round(width, 3),
              "lowest_sun_elevation_deg": round(elev, 2)})
    return c


def with_checks(validity: Validity, checks: Iterable[Check], settings: Mapping[str, Any] | None = None) -> Validity:
    """``validity`` with more checks; the confidence factor drops to ``[conditions]
    confidence_floor`` when ``registration`` failed, and is multiplied like the acquisition
    checks' for the others."""
    st = _settings(settings)
    floor = float(st["confidence_floor"])
    factor = float(validity.confidence_factor)
    checks = tuple(checks)
    for c in checks:
        if c["passed"] is False:
            factor = floor if c["name"] == "registration" else min(factor, max(factor * _factor(c), floor))
            logger.warning("validity: %s", c.get("message", c["name"]))
    return Validity(checks=tuple(validity.checks) + tuple(checks), confidence_factor=float(factor))
