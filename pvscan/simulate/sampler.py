"""Random flights: a whole plausible scenario drawn from documented ranges.

:func:`draw_scenario` turns a seed (and a family) into a scenario mapping for
:func:`pvscan.simulate.simulate_flight`; ``pvscan simulate --random SEED --out DIR
[--family NAME]`` writes the flight and the drawn ``scenario.toml`` beside it, so
``pvscan simulate DIR/scenario.toml --seed SEED`` replays it. Nobody tuned on these flights.

Ranges (uniform unless said otherwise; "common practice" unless a source is named):

- **site**: latitude 20-55 deg, north or south (equal odds), longitude -120..150 deg; the UTC
  offset is the longitude's nominal zone, ``round(lon / 15)`` h.
- **date and hour**: any day of 2026; local clock 09:30-15:30 (fixed tables), any time with
  the sun at least 25 deg high; ``raised_low_sun`` 12-25 deg in the morning; the
  ``*_noon`` family within an hour of solar noon.
- **conditions** within the acquisition limits of IEC TS 62446-3 (irradiance at least
  600 W/m2, steady sky, moderate wind): plane-of-array 600-1000 W/m2, air 5-35 degC,
  wind 0.5-6 m/s, humidity 20-80 %; one flight in three with conditions varying along it
  (a passing thin cloud's dip of 5 % and a drift of 0.5 W/m2 per minute: the irradiance
  changes by less than 10 % over a flight of up to 30 min; those flights start at least
  642 W/m2 bright, so the dip stays above 600 W/m2).
- **array**: fixed tables (60 %) or single-axis trackers (40 %); portrait or landscape;
  full or half-cut cells; fixed: 1-3 module rows (landscape 2-4), 8-20 columns, tilt 10-35 deg,
  pitch 1.6-2.6 x the table depth, lower edge 0.5-1.2 m above ground (``raised_low_sun`` 1-2 m),
  field turned -10..10 deg; trackers: 1 row in portrait (or 2 in landscape), 10-30 columns,
  lower edge 1.0-2.0 m, the tracking angle of :func:`pvlib.tracking.singleaxis` (max 55 deg,
  backtracking) at the middle of the flight.
- **size**: 2-4 table rows of 1-3 tables (``small_site``: one registration block, at most
  ~40 m across; ``large_site``: 10-16 rows of 4-6 tables).
- **ground**: hot (sunlit ground 15-30 K above the air at 1000 W/m2) or cold (-3..6 K) with
  equal odds (``cold_ground``: cold, ``tracker_hot_ground_noon``: 20-30 K); shade -3..4 K;
  texture 0.5-2 K; site-wide field 0-3 K.
- **camera and altitude** within the resolution a detailed inspection needs (at least
  ``[conditions] min_px_per_cell`` = 3 px along a cell edge, IEC TS 62446-3 from memory; common
  practice flies for several pixels per cell): the ortho's pixels per cell edge (the shorter
  edge: 0.173 m full cells, 0.095 m half-cut cells) 3.3-6 px, so the ground sampling distance
  is 2.9-5.2 cm on full cells and 1.6-2.9 cm on half-cut cells; a 640 x 512 px sensor of 12 um
  pitch behind a 9, 13, 19 or 25 mm lens, the one (drawn among those that fit) that puts the
  flight 25-100 m above the modules (``altitude = GSD * focal length / pitch``, the pinhole
  camera; common practice for thermal mapping flights); detector time constant 7-14 ms
  (motion blur over 4 m/s x the time constant); point spread 0.4-1.0 px,
  NETD 0.03-0.08 K, band 7.5-13.5 or 8-14 um; export emissivity 1.0 or 0.95.
- **distractors**: 0-1 cloud shadows, 0-3 sky reflections, 0-2 mosaic seams, 0-1 hot objects.
- **defects**: every pattern 0-2 times (open string and PID 0-1 strings), at least one defect.
- **terrain** (own random stream, so the draws above stay as they were for a seed): level in
  half the flights, else a plane sloping 1-8 deg toward any azimuth; tables follow it.
- **diffuse share** of the irradiance 0.12-0.3 (what a cell keeps in another row's shadow).
- **mosaic optics**: residual vignetting 0-0.03 of the cosine-fourth falloff; seams misaligned
  by 0.02-0.12 m; the ortho's surface model misses none of the tables' height (a true ortho)
  in 45 % of flights, 5-30 % of it (a smoothed surface model) in 40 %, all of it (an ortho on
  a ground-level model) in 15 %.
- ``raised_low_sun``: half its flights in the morning (sun beside the rows), half within two
  hours of noon in winter at latitude 40-55 deg (sun in front: the rows shade the next row).
- **layout error**: shift within +-1 m, rotation within +-0.3 deg, scale within +-0.2 %,
  local distortion 0-3 cm (``turned_layout``: rotation 0.2-2 deg either way, scale error
  up to 1 %, shift up to 1.5 m; ``no_layout_error``: none; ``tracker_hot_ground_noon``,
  ``raised_low_sun`` and ``cold_ground`` keep the default small errors).
"""
from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

import numpy as np

from pvscan.errors import SimulationError

__all__ = ["FAMILIES", "draw_scenario"]

#: Flight families of :func:`draw_scenario`.
FAMILIES = ("any", "fixed", "tracker", "tracker_hot_ground_noon", "raised_low_sun", "cold_ground",
            "turned_layout", "no_layout_error", "small_site", "large_site")

_MODULES = {  # invented datasheets: (pmax, width, length, voc, isc, half_cut)
    False: (410.0, 1.038, 2.094, 49.1, 10.6, False),
    True: (545.0, 1.134, 2.279, 49.6, 13.9, True),
}


#: Pixels of the ortho along a cell's shorter edge [px]: at least the 3 px of a detailed
#: inspection (``[conditions] min_px_per_cell``, IEC TS 62446-3 from memory), with a margin.
PX_PER_CELL = (3.3, 6.0)
#: Sensor pixel pitch [m] and lens focal lengths [m] of the drawn thermal cameras (common
#: practice for 640 x 512 px uncooled microbolometers).
PIXEL_PITCH_M = 12e-6
FOCAL_LENGTHS_M = (0.009, 0.013, 0.019, 0.025)
#: Flight height above the modules [m] (common practice for mapping flights over plants).
ALTITUDE_M = (25.0, 100.0)
#: Thermal time constant of the microbolometer [ms] (common practice: 7-15 ms): at the
#: sampler's 4 m/s the image trails 3-6 cm behind the travel (motion blur).
TIME_CONSTANT_MS = (7.0, 14.0)

#: On a random flight with varying conditions a passing thin cloud dims the sun by this share
#: of the mean [-], and the irradiance drifts by this much per minute [W/m2/min]: together they
#: keep the change of irradiance over a flight of up to 30 min, (max - min) / mean, under the
#: acquisition limit of 10 % (IEC TS 62446-3, from memory), so that the random families stay
#: within the acquisition limits they promise (the scenario defaults' deeper dip of 12 % took
#: a flight of 80 s to 11 %). A deeper dip is for a scenario that tests the check.
VARYING_DIP_DEPTH = 0.05
VARYING_DRIFT_W_M2_PER_MIN = 0.5

# Flights with varying conditions start at least this bright, so that the dimmest moment of
# the dip still leaves 600 W/m2 (the acquisition limit, IEC TS 62446-3 from memory) with a
# 10 W/m2 margin.
_VARYING_MIN_POA_W_M2 = float(math.ceil(600.0 / (1.0 - VARYING_DIP_DEPTH) + 10.0))


def cell_edge_m(module: dict) -> float:
    """Shorter edge of a cell [m]: ``width / cells_across`` or ``length / cells_along`` (doubled
    along the length for half-cut cells)."""
    along = int(module["cells_along"]) * (2 if module.get("half_cut") else 1)
    return min(float(module["width_m"]) / int(module["cells_across"]), float(module["length_m"]) / along)


def _gsd_m(module: dict, px_per_cell: float) -> float:
    """Ground sampling distance giving ``px_per_cell`` pixels along the cell's shorter edge
    [m/px], rounded down to 0.1 mm (never fewer pixels per cell than drawn)."""
    return math.floor(cell_edge_m(module) / px_per_cell * 1e4) / 1e4


def _altitude_m(rng: np.random.Generator, gsd_m: float) -> float:
    """Height above the modules of a lens that gives ``gsd_m``: ``GSD * f / pitch`` (pinhole
    camera), for a focal length drawn among those that keep it within :data:`ALTITUDE_M`."""
    heights = [gsd_m * f / PIXEL_PITCH_M for f in FOCAL_LENGTHS_M]
    fit = [h for h in heights if ALTITUDE_M[0] <= h <= ALTITUDE_M[1]]
    if not fit:  # no lens fits: the nearest height within the range
        fit = [min(max(h, ALTITUDE_M[0]), ALTITUDE_M[1]) for h in heights]
    return round(float(fit[int(rng.integers(len(fit)))]), 1)


def _sun(lat: float, lon: float, when: datetime) -> tuple[float, float]:
    import pandas as pd
    import pvlib

    pos = pvlib.solarposition.get_solarposition(pd.DatetimeIndex([when]), lat, lon)
    return float(pos["apparent_elevation"].iloc[0]), float(pos["azimuth"].iloc[0])


def _when(rng: np.random.Generator, lat: float, lon: float, family: str, kind: str,
          low_noon: bool = False) -> datetime:
    """A flight start with the sun in the family's range (solar position by pvlib)."""
    tz = timezone(timedelta(hours=int(round(lon / 15.0))))
    for _ in range(400 if low_noon else 200):
        day = datetime(2026, 1, 1, tzinfo=tz) + timedelta(days=int(rng.integers(0, 365)))
        noon_utc = 12.0 - lon / 15.0  # solar noon, ignoring the equation of time [h UTC]
        if family == "raised_low_sun" and low_noon:  # a winter sun low in front of the rows
            hour = noon_utc + float(rng.uniform(-2.0, 2.0))
        elif family == "raised_low_sun":
            hour = noon_utc + float(rng.uniform(-6.0, -3.0))
        elif family == "tracker_hot_ground_noon":
            hour = noon_utc + float(rng.uniform(-1.0, 1.0))
        elif kind == "fixed":
            hour = float(rng.uniform(9.5, 15.5)) - tz.utcoffset(None).total_seconds() / 3600.0
        else:
            hour = noon_utc + float(rng.uniform(-4.5, 4.5))
        when = (day.astimezone(UTC) .replace(hour=0, minute=0) + timedelta(hours=hour)).astimezone(tz)
        elev, _ = _sun(lat, lon, when)
        low = family == "raised_low_sun"
        if (12.0 <= elev <= 25.0) if low else elev >= 25.0:
            return when.replace(second=0, microsecond=0)
    raise SimulationError(f"random flight: no date with the sun in range for family {family!r}")


def _tracker_tilt(lat: float, lon: float, when: datetime, gcr: float) -> tuple[float, str]:
    import pandas as pd
    import pvlib

    pos = pvlib.solarposition.get_solarposition(pd.DatetimeIndex([when]), lat, lon)
    tr = pvlib.tracking.singleaxis(pos["apparent_zenith"], pos["azimuth"], axis_tilt=0, axis_azimuth=180,
                                   max_angle=55, backtrack=True, gcr=gcr)
    theta = float(np.nan_to_num(tr["tracker_theta"].iloc[0]))
    # pvlib: positive rotation turns a north-south axis' modules to face west
    return abs(theta), ("west" if theta >= 0 else "east")


def draw_scenario(seed: int, family: str = "any") -> dict:
    """A random scenario of a flight family (see the module notes for every range).

    Parameters
    ----------
    seed : int
        Seed of the draw (the same seed and family give the same scenario).
    family : str
        One of :data:`FAMILIES`.

    Returns
    -------
    dict
        A scenario for :func:`pvscan.simulate.simulate_flight` (missing keys take the defaults).

    Raises
    ------
    SimulationError
        Unknown family.
    """
    if family not in FAMILIES:
        raise SimulationError(f"--family {family!r}: unknown (one of {', '.join(FAMILIES)})")
    rng = np.random.default_rng([int(seed), 20260614, FAMILIES.index(family)])
    u = rng.uniform
    if family in ("tracker", "tracker_hot_ground_noon"):
        kind = "tracker"
    elif family in ("fixed", "raised_low_sun"):
        kind = "fixed"
    else:
        kind = "tracker" if u() < 0.4 else "fixed"
    lat = float(u(20.0, 55.0)) * (1 if u() < 0.5 else -1)
    lon = float(u(-120.0, 150.0))
    # the keys added later draw from their own stream, so that every earlier draw of a seed stays
    rng2 = np.random.default_rng([int(seed), 20260614, FAMILIES.index(family), 2])
    low_noon = family == "raised_low_sun" and bool(rng2.uniform() < 0.5)
    if low_noon:
        lat = float(np.sign(lat) * rng2.uniform(40.0, 55.0))
    when = _when(rng, lat, lon, family, kind, low_noon)

    half = bool(u() < 0.5)
    pmax, width, length, voc, isc, _ = _MODULES[half]
    module = {"model": f"Random {pmax:.0f} W ({'half-cut' if half else 'full cells'}, invented)",
              "pmax_w": pmax, "width_m": width, "length_m": length, "voc_v": voc, "isc_a": isc,
              "half_cut": half, "cells_across": 6, "cells_along": 12, "bypass_diodes": 3}
    portrait = bool(u() < 0.6) if kind == "fixed" else bool(u() < 0.7)
    array: dict = {"kind": kind, "orientation": "portrait" if portrait else "landscape"}
    if kind == "fixed":
        array["rows"] = int(rng.integers(1, 4)) if portrait else int(rng.integers(2, 5))
        array["cols"] = int(rng.integers(8, 21))
        array["tilt_deg"] = round(float(u(10.0, 35.0)), 1)
        array["rotation_deg"] = round(float(u(-10.0, 10.0)), 2)
        array["mount_height_m"] = round(float(u(1.0, 2.0) if family == "raised_low_sun" else u(0.5, 1.2)), 2)
        array["facing"] = "equator"
    else:
        array["rows"] = 1 if portrait else 2
        array["cols"] = int(rng.integers(10, 31))
        array["mount_height_m"] = round(float(u(1.0, 2.0)), 2)
        array["rotation_deg"] = round(float(u(-5.0, 5.0)), 2)
    across = (length if portrait else width) * array["rows"] + 0.02 * (array["rows"] - 1)
    if family == "large_site":
        array["table_rows"], array["tables_per_row"] = int(rng.integers(10, 17)), int(rng.integers(4, 7))
    elif family == "small_site":
        array["table_rows"], array["tables_per_row"] = int(rng.integers(2, 4)), 1
        array["cols"] = min(array["cols"], 16)
    else:
        array["table_rows"], array["tables_per_row"] = int(rng.integers(2, 5)), int(rng.integers(1, 4))
    if kind == "tracker":
        pitch = round(across / float(u(0.3, 0.5)), 2)  # ground coverage ratio 0.3-0.5
        tilt, facing = _tracker_tilt(lat, lon, when, across / pitch)
        array["tilt_deg"], array["facing"] = round(max(tilt, 0.5), 2), facing
    else:
        depth = across * math.cos(math.radians(array["tilt_deg"]))
        pitch = round(depth * float(u(1.6, 2.6)) + 0.3, 2)
    array["row_pitch_m"] = pitch
    cols = array["cols"]
    divisors = [d for d in range(4, cols + 1) if cols % d == 0]
    array["modules_per_string"] = int(rng.choice(divisors)) if divisors else 0

    cold = family == "cold_ground" or (family not in ("tracker_hot_ground_noon",) and u() < 0.5)
    ground = {"sun_rise_k": round(float(u(-3.0, 6.0) if cold else (u(20.0, 30.0) if family == "tracker_hot_ground_noon"
                                                                   else u(15.0, 30.0))), 2),
              "shade_rise_k": round(float(u(-3.0, 4.0)), 2), "texture_k": round(float(u(0.5, 2.0)), 2),
              "field_k": round(float(u(0.0, 3.0)), 2)}
    poa_w_m2 = u(600.0, 750.0) if family == "raised_low_sun" else u(600.0, 1000.0)
    conditions = {"poa_irradiance_w_m2": round(float(poa_w_m2), 1),
                  "ambient_c": round(float(u(5.0, 35.0)), 1), "wind_m_s": round(float(u(0.5, 6.0)), 2),
                  "relative_humidity_pct": round(float(u(20.0, 80.0)), 1), "varying": bool(u() < 1 / 3)}
    if conditions["varying"]:
        # a passing cloud dims the sun by irradiance_dip_depth of the mean: start high enough
        # that the dimmest moment still meets the acquisition limit of 600 W/m2
        conditions["poa_irradiance_w_m2"] = round(max(conditions["poa_irradiance_w_m2"], _VARYING_MIN_POA_W_M2), 1)
        conditions["irradiance_dip_depth"] = VARYING_DIP_DEPTH
        conditions["poa_drift_w_m2_per_min"] = VARYING_DRIFT_W_M2_PER_MIN
    px_per_cell = float(u(*PX_PER_CELL))
    camera: dict[str, Any] = {"gsd_m": _gsd_m(module, px_per_cell), "psf_sigma_px": round(float(u(0.4, 1.0)), 2),
              "netd_k": round(float(u(0.03, 0.08)), 3),
              "band_um": [7.5, 13.5] if u() < 0.5 else [8.0, 14.0]}
    export = {"emissivity": 1.0 if u() < 0.6 else 0.95}
    distractors: dict[str, Any] = {"cloud_shadows": int(rng.integers(0, 2)), "reflections": int(rng.integers(0, 4)),
                   "seams": int(rng.integers(0, 3)), "hot_objects": int(rng.integers(0, 2))}
    defects = {k: int(rng.integers(0, 3)) for k in ("hot_cell", "several_hot_cells", "bypassed_substring",
                                                     "several_bypassed_substrings", "open_module", "soiling",
                                                     "junction_box")}
    defects["open_string"] = int(rng.integers(0, 2))
    defects["pid"] = int(rng.integers(0, 2)) if array["modules_per_string"] else 0
    if not any(defects.values()):
        defects["hot_cell"] = 1
    defects["min_spacing_modules"] = 1
    layout: dict[str, Any]
    if family == "no_layout_error":
        layout = {"offset_m": [0.0, 0.0]}
    elif family == "turned_layout":
        r = float(rng.uniform(0.0, 1.5))
        a = float(rng.uniform(0.0, 2 * math.pi))
        layout = {"offset_m": [round(r * math.cos(a), 3), round(r * math.sin(a), 3)],
                  "rotation_deg": round(float(u(0.2, 2.0)) * (1 if u() < 0.5 else -1), 3),
                  "scale": round(1.0 + float(u(-0.01, 0.01)), 5), "local_rms_m": round(float(u(0.0, 0.03)), 3)}
    else:
        layout = {"offset_m": [round(float(u(-1.0, 1.0)), 3), round(float(u(-1.0, 1.0)), 3)],
                  "rotation_deg": round(float(u(-0.3, 0.3)), 3), "scale": round(1.0 + float(u(-0.002, 0.002)), 5),
                  "local_rms_m": round(float(u(0.0, 0.03)), 3)}
    layout["features"] = "modules" if u() < 0.7 else "tables"
    name = f"Random plant {family} {int(seed)} (invented)"
    u2 = rng2.uniform
    slope = 0.0 if u2() < 0.5 else round(float(u2(1.0, 8.0)), 2)
    terrain = {"slope_deg": slope, "aspect_deg": round(float(u2(0.0, 360.0)), 1)}
    conditions["diffuse_fraction"] = round(float(u2(0.12, 0.3)), 3)
    camera["vignetting"] = round(float(u2(0.0, 0.03)), 4)
    k = u2()
    relief = 0.0 if k < 0.45 else (1.0 if k > 0.85 else round(float(u2(0.05, 0.3)), 3))
    distractors["seam_shift_m"] = [0.02, round(float(u2(0.02, 0.12)), 3)]
    rng3 = np.random.default_rng([int(seed), 20260614, FAMILIES.index(family), 3])
    altitude_m = _altitude_m(rng3, camera["gsd_m"])
    camera["time_constant_ms"] = round(float(rng3.uniform(*TIME_CONSTANT_MS)), 1)
    return {
        "site": {"name": name, "lon": round(lon, 5), "lat": round(lat, 5)},
        "flight": {"start": when.isoformat(), "id": f"random-{family}-{int(seed)}", "speed_m_s": 4.0,
                   "altitude_m": altitude_m},
        "array": array, "module": module, "conditions": conditions, "ground": ground, "camera": camera,
        "export": export, "distractors": distractors, "defects": defects, "layout": layout,
        "ortho": {"margin_m": 5.0, "preview_px": 600, "relief_height_fraction": relief}, "terrain": terrain,
    }
