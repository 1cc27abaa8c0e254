"""Energy a lost power costs over a year: the site's specific yield.

``energy_loss_kwh_per_year = power_loss_w / 1000 * specific_yield`` with the specific yield
[kWh/kWp/yr] of the manifest when it gives one, else :func:`specific_yield` from a clear-sky
year at the site, derated for clouds and system losses (``[loss] energy_derate``).

References
----------
.. [1] P. Ineichen and R. Perez, "A new airmass independent formulation for the Linke
   turbidity coefficient", Solar Energy 73(3), 151-157, 2002. doi:10.1016/S0038-092X(02)00045-2
.. [2] W. F. Holmgren, C. W. Hansen and M. A. Mikofski, "pvlib python: a python package for
   modeling solar energy systems", Journal of Open Source Software 3(29), 884, 2018.
   doi:10.21105/joss.00884
"""
from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping
from functools import lru_cache
from typing import Any

import numpy as np
import pandas as pd

from pvscan.io.settings import section

__all__ = ["specific_yield", "site_lonlat", "site_yield"]

log = logging.getLogger(__name__)


def _get(obj: Any, name: str) -> Any:
    if obj is None:
        return None
    if isinstance(obj, Mapping):
        return obj.get(name)
    return getattr(obj, name, None)


@lru_cache(maxsize=32)
def _specific_yield_cached(lat: float, lon: float, tilt: float, azimuth: float, derate: float, albedo: float,
                           year: int, linke: float | None, altitude: float) -> float:
    import pvlib

    with warnings.catch_warnings():
        # pvlib (0.13) uses pandas accessors that pandas 3 deprecates; not ours to fix
        warnings.filterwarnings("ignore", category=DeprecationWarning, module=r"pvlib\..*")
        warnings.filterwarnings("ignore", category=DeprecationWarning, module=r"pandas\..*")
        return _clear_sky_yield(pvlib, lat, lon, tilt, azimuth, derate, albedo, year, linke, altitude)


def _clear_sky_yield(pvlib: Any, lat: float, lon: float, tilt: float, azimuth: float, derate: float,
                     albedo: float, year: int, linke: float | None, altitude: float) -> float:
    loc = pvlib.location.Location(lat, lon, tz="UTC", altitude=altitude)
    times = pd.date_range(f"{year}-01-01 00:30", periods=int(pd.Timestamp(f"{year}-12-31").day_of_year) * 24,
                          freq="1h", tz="UTC")
    solpos = loc.get_solarposition(times)
    kwargs = {} if linke is None else {"linke_turbidity": linke}
    cs = loc.get_clearsky(times, model="ineichen", solar_position=solpos, **kwargs)
    poa = pvlib.irradiance.get_total_irradiance(
        surface_tilt=tilt, surface_azimuth=azimuth, solar_zenith=solpos["apparent_zenith"],
        solar_azimuth=solpos["azimuth"], dni=cs["dni"], ghi=cs["ghi"], dhi=cs["dhi"], albedo=albedo,
        model="isotropic")
    kwh_m2 = float(np.nansum(poa["poa_global"].to_numpy())) / 1000.0  # hourly W/m2 -> kWh/m2
    return kwh_m2 * derate


def specific_yield(latitude: float, longitude: float, surface_tilt: float = 0.0, surface_azimuth: float = 180.0,
                   *, settings: Mapping[str, Any] | None = None, derate: float | None = None,
                   albedo: float | None = None, year: int | None = None,
                   linke_turbidity: float | None = None, altitude: float = 0.0) -> float:
    """Yearly specific yield from a clear-sky year on the plane of array. [kWh/kWp/yr]

    Hourly (mid-hour) Ineichen-Perez clear-sky irradiance over one year, transposed to the
    plane of array with the isotropic sky model, summed to kWh/m2 (one kWp yields one kWh
    per kWh/m2 at STC), times ``derate`` for clouds and system losses.

    Parameters
    ----------
    latitude, longitude : float
        Site position, WGS84. [deg]
    surface_tilt : float
        Module tilt from horizontal. [deg]
    surface_azimuth : float
        Direction the modules face, clockwise from north. [deg]
    settings : Pipeline or mapping, optional
        The pipeline or its ``[loss]`` section: the values below that are not given.
    derate : float, optional
        Cloud and system derate (``[loss] energy_derate``). [-] A measured yield in the
        manifest is always better.
    albedo : float, optional
        Ground reflectance (``[loss] albedo``). [-]
    year : int, optional
        Calendar year simulated (``[loss] yield_year``; only the sun's path matters).
    linke_turbidity : float, optional
        Constant Linke turbidity (``[loss] linke_turbidity``); default: pvlib's monthly
        climatology at the site.
    altitude : float
        Site altitude. [m]

    References
    ----------
    .. [1] P. Ineichen and R. Perez, Solar Energy 73(3), 151-157, 2002.
       doi:10.1016/S0038-092X(02)00045-2
    .. [2] B. Y. H. Liu and R. C. Jordan, "The long-term average performance of flat-plate
       solar-energy collectors", Solar Energy 7(2), 53-74, 1963.
    """
    cfg = section(settings, "loss")
    derate = float(cfg["energy_derate"]) if derate is None else derate
    albedo = float(cfg["albedo"]) if albedo is None else albedo
    year = int(cfg["yield_year"]) if year is None else year
    linke_turbidity = cfg.get("linke_turbidity") if linke_turbidity is None else linke_turbidity
    return _specific_yield_cached(round(float(latitude), 4), round(float(longitude), 4), float(surface_tilt),
                                  float(surface_azimuth), float(derate), float(albedo), int(year),
                                  None if linke_turbidity is None else float(linke_turbidity), float(altitude))


def site_lonlat(modules: Any) -> tuple[float, float]:
    """WGS84 ``(lon, lat)`` [deg] of the layout's centroid (bounding-box centre of the footprints)."""
    from pyproj import Transformer

    x0, y0, x1, y1 = modules.total_bounds
    tr = Transformer.from_crs(modules.crs, 4326, always_xy=True)
    lon, lat = tr.transform((x0 + x1) / 2.0, (y0 + y1) / 2.0)
    return float(lon), float(lat)


def site_yield(site: Any, modules: Any = None, layout: Any = None, settings: Mapping[str, Any] | None = None,
               override: float | None = None, lonlat: tuple[float, float] | None = None) -> tuple[float | None, str]:
    """The specific yield a run uses and where it came from. [kWh/kWp/yr]

    ``override`` ("given") > the manifest's ``specific_yield_kwh_per_kwp`` ("manifest") >
    :func:`specific_yield` at ``lonlat`` or the layout's centroid ("clear_sky"); ``(None,
    "none")`` when there is no usable position.
    """
    if override is not None:
        return float(override), "given"
    sy = _get(site, "specific_yield_kwh_per_kwp")
    if sy is not None:
        return float(sy), "manifest"
    if lonlat is not None:
        lon, lat = float(lonlat[0]), float(lonlat[1])
    elif modules is not None and len(modules) and modules.crs is not None:
        lon, lat = site_lonlat(modules)
    else:
        log.info("no specific yield and no site position: energy loss left empty")
        return None, "none"
    if not (np.isfinite(lon) and np.isfinite(lat) and -90.0 <= lat <= 90.0):
        log.info("site position %s, %s is not usable: energy loss left empty", lon, lat)
        return None, "none"
    tilt = _get(layout, "tilt_deg")
    az = _get(layout, "azimuth_deg")
    sy = specific_yield(lat, lon, 0.0 if tilt is None else float(tilt), 180.0 if az is None else float(az),
                        settings=settings)
    return sy, "clear_sky"
