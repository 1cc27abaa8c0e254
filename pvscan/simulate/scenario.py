"""Simulation scenarios: an invented plant, its flight, its weather and its defects.

A scenario is a TOML file (documented by the commented example ``demo_site/scenario.toml``
and validated by ``schemas/scenario.schema.json``). Every key is optional except the site's
centre; missing keys take the defaults of :data:`DEFAULTS`. :func:`load_scenario` returns a
plain nested ``dict`` with all defaults filled in, so a test can also build a scenario in
code: ``simulate_flight({"site": {"lon": 8.1, "lat": 47.3}, "defects": {"open_module": 1}}, tmp)``.
"""
from __future__ import annotations

import copy
import math
from collections.abc import Mapping
from os import PathLike
from pathlib import Path
from typing import Any, TypeAlias

from pvscan.errors import SimulationError
from pvscan.io.resources import describe_error, load_schema, read_toml_file, schema_errors

__all__ = ["DEFAULTS", "DEFECT_KINDS", "Scenario", "load_scenario", "scenario_from_dict"]

#: A scenario: its TOML tables (``site``, ``array``, ``module``, ``flight`` ...) as nested dicts,
#: complete once :func:`scenario_from_dict` filled in the defaults.
Scenario: TypeAlias = dict[str, Any]

#: Defect patterns the simulator can place (the project's defect vocabulary).
DEFECT_KINDS = (
    "hot_cell",
    "several_hot_cells",
    "bypassed_substring",
    "several_bypassed_substrings",
    "open_module",
    "open_string",
    "pid",
    "soiling",
    "junction_box",
)

#: Defaults of every scenario key (see ``demo_site/scenario.toml`` for the meaning of each).
DEFAULTS: dict[str, Any] = {
    "site": {
        "name": "Unnamed simulated plant",
        "specific_yield_kwh_per_kwp": 1400.0,
        "tariff_per_kwh": 0.08,
        "currency": "EUR",
    },
    "flight": {
        "start": "2026-06-14T10:40:00+02:00",
        "altitude_m": 35.0,
        "speed_m_s": 4.0,
        "frame_px": [640, 512],
        "front_overlap": 0.7,
        "side_overlap": 0.3,
        "turn_s": 8.0,
        "lines": "rows",
        "write_frames": "auto",
    },
    "array": {
        "kind": "fixed",
        "table_rows": 2,
        "tables_per_row": 2,
        "rows": 2,
        "cols": 12,
        "orientation": "portrait",
        "gap_m": 0.02,
        "table_gap_m": 1.0,
        "row_pitch_m": 6.5,
        "tilt_deg": 25.0,
        "facing": "equator",
        "rotation_deg": 0.0,
        "modules_per_string": 0,
        "frame_width_m": 0.035,
        "mount_height_m": 0.6,
    },
    "layout": {
        "features": "modules",
        "format": "geojson",
        "offset_m": [0.0, 0.0],
        "rotation_deg": 0.0,
        "scale": 1.0,
        "local_rms_m": 0.0,
        "strings": True,
    },
    "module": {
        "model": "Simulated 410 W mono PERC",
        "pmax_w": 410.0,
        "gamma_pmax_pct_per_k": -0.35,
        "width_m": 1.038,
        "length_m": 2.094,
        "cells_across": 6,
        "cells_along": 12,
        "half_cut": False,
        "bypass_diodes": 3,
        "emissivity": 0.85,
    },
    "conditions": {
        "poa_irradiance_w_m2": 870.0,
        "ambient_c": 26.5,
        "wind_m_s": 2.1,
        "relative_humidity_pct": 45.0,
        "write_sky_c": True,
        "u0": 25.0,
        "u1": 6.84,
        "module_spread_k": 0.6,
        "measurement_spread_k": 0.25,
        "cell_spread_k": 0.25,
        "frame_drop": 0.35,
        "diffuse_fraction": 0.2,
        "varying": False,
        "poa_drift_w_m2_per_min": 2.0,
        "ambient_drift_c_per_min": 0.05,
        "wind_drift_m_s_per_min": 0.0,
        "wind_gust_m_s": 0.3,
        "irradiance_dips": 1,
        "irradiance_dip_depth": 0.12,
        "series_step_s": 10.0,
    },
    "terrain": {
        "slope_deg": 0.0,
        "aspect_deg": 0.0,
    },
    "ground": {
        "emissivity": 0.95,
        "sun_rise_k": 14.0,
        "shade_rise_k": 2.0,
        "texture_k": 1.5,
        "field_k": 0.0,
        "field_scale_m": 40.0,
    },
    "camera": {
        "gsd_m": 0.05,
        "psf_sigma_px": 0.6,
        "netd_k": 0.05,
        "band_um": [7.5, 13.5],
        "transmission": "auto",
        "vignetting": 0.0,
        "time_constant_ms": 0.0,
    },
    "export": {
        "units": "celsius",
        "emissivity": 1.0,
        "reflected_c": 20.0,
        "nodata": -9999.0,
        "raw_scale": 0.01,
    },
    "ortho": {
        "tiles": [1, 1],
        "tile_overlap_m": 4.0,
        "margin_m": 5.0,
        "nodata_border_m": 2.0,
        "block_px": 512,
        "preview_px": 1400,
        "relief_height_fraction": 0.0,
    },
    "distractors": {
        "cloud_shadows": 0,
        "cloud_shadow_depth": 0.25,
        "cloud_shadow_size_m": 40.0,
        "reflections": 0,
        "reflection_k": 12.0,
        "reflection_size_m": 3.0,
        "seams": 0,
        "seam_step_k": [0.5, 2.0],
        "seam_shift_m": [0.0, 0.0],
        "hot_objects": 0,
    },
    "defects": {
        **{k: 0 for k in DEFECT_KINDS},
        "hot_cell_rise_k": [10.0, 50.0],
        "soiling_rise_k": [4.0, 10.0],
        "soiling_height": [0.05, 0.15],
        "junction_box_rise_k": [8.0, 25.0],
        "junction_box_px": [2.0, 4.0],
        "pid_loss_fraction": [0.25, 0.5],
        "pid_modules": [3, 6],
        "open_string_modules": 0,
        "min_spacing_modules": 2,
        "heat_model": "diode",
    },
}


def _merge(base: dict[str, Any], over: Mapping[str, Any]) -> dict[str, Any]:
    out = copy.deepcopy(base)
    for k, v in over.items():
        if isinstance(v, Mapping) and isinstance(out.get(k), dict):
            out[k] = _merge(out[k], v)
        else:
            out[k] = copy.deepcopy(v)
    return out


def _check(sc: Scenario, where: str) -> None:
    m = sc["module"]
    if m["width_m"] > m["length_m"]:
        raise SimulationError(f"{where}: key module.width_m is larger than module.length_m (width is the short side)")
    if m["cells_across"] % m["bypass_diodes"]:
        raise SimulationError(f"{where}: key module.bypass_diodes does not divide module.cells_across")
    a = sc["array"]
    cos_t = math.cos(math.radians(a["tilt_deg"]))
    across = m["length_m"] if a["orientation"] == "portrait" else m["width_m"]
    depth = a["rows"] * across * cos_t + (a["rows"] - 1) * a["gap_m"] * cos_t
    if a["row_pitch_m"] <= depth:
        raise SimulationError(
            f"{where}: key array.row_pitch_m ({a['row_pitch_m']}) must exceed the table depth seen from "
            f"above ({depth:.2f} m)")
    if a["kind"] == "tracker" and a["facing"] not in ("east", "west"):
        raise SimulationError(f"{where}: key array.facing must be east or west for trackers")
    if a["kind"] == "fixed" and a["facing"] in ("east", "west"):
        raise SimulationError(f"{where}: key array.facing {a['facing']!r} needs array.kind = 'tracker'")
    mps = a["modules_per_string"]
    if mps and a["cols"] % mps:
        raise SimulationError(f"{where}: key array.modules_per_string ({mps}) does not divide array.cols ({a['cols']})")
    if sc["camera"]["gsd_m"] * 8 > m["width_m"]:
        raise SimulationError(f"{where}: key camera.gsd_m is too coarse: a module must span at least 8 pixels")
    from datetime import datetime

    start = sc["flight"]["start"]
    try:
        t0 = datetime.fromisoformat(start.replace("Z", "+00:00"))
    except ValueError:
        raise SimulationError(f"{where}: key flight.start: {start!r} is not an ISO 8601 date-time") from None
    if t0.tzinfo is None:
        raise SimulationError(f"{where}: key flight.start: {start!r} has no UTC offset (write e.g. +02:00 or Z)")
    lo, hi = sc["defects"]["pid_modules"]
    if lo > hi:
        raise SimulationError(f"{where}: key defects.pid_modules: the lower bound exceeds the upper")


def scenario_from_dict(data: Mapping[str, Any], where: str = "scenario") -> Scenario:
    """Validate a scenario mapping and fill in the defaults.

    Parameters
    ----------
    data : mapping
        Scenario keys (as parsed from TOML).
    where : str
        Name used in error messages (the file path).

    Returns
    -------
    dict
        A complete scenario (deep copy).

    Raises
    ------
    SimulationError
        One line naming the key and what is wrong.
    """
    errs = schema_errors(dict(data), load_schema("scenario.schema.json"))
    if errs:
        raise SimulationError(f"{where}: {describe_error(errs[0])}")
    sc = _merge(DEFAULTS, data)
    if "name" not in data.get("site", {}):
        sc["site"]["name"] = DEFAULTS["site"]["name"]
    _check(sc, where)
    return sc


def load_scenario(path: str | PathLike[str]) -> Scenario:
    """Read and validate a scenario TOML file.

    Parameters
    ----------
    path : path-like
        Scenario file.

    Returns
    -------
    dict
        The complete scenario with defaults filled in, plus ``"_path"`` (the file).

    Raises
    ------
    SimulationError
        Missing file, invalid TOML, unknown key or a value out of range.
    """
    path = Path(path)
    data = read_toml_file(path, SimulationError, "scenario file")
    sc = scenario_from_dict(data, str(path))
    sc["_path"] = str(path)
    return sc
