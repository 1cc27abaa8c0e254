"""Synthetic flights with ground truth: what a real flight gives pvscan, plus the truth.

:func:`simulate_flight` turns a scenario (an invented plant, its flight, weather, camera
and defects; see ``demo_site/scenario.toml``) into a flight folder:

- ``thermal.tif`` (or tiles ``thermal_r<i>c<j>.tif``): single-band apparent temperature,
  tiled 256 x 256, deflate, nodata, in the site's UTM zone;
- ``layout.geojson`` (RFC 7946) / ``.gpkg`` / ``.shp``: module or table polygons as drawn
  (optionally shifted against the ortho);
- ``flight.toml``: the flight manifest;
- ``weather.csv`` and ``frames.geojson`` when the conditions vary during the flight;
- ``truth.geojson`` (per module, geometry as the layout draws it) and ``truth.json`` (layout
  offset and ``layout_error``, scenario, seed, defects);
- ``truth_ortho.geojson``: the true module polygons as they stand in the ortho (ortho CRS;
  displaced by relief when the ortho's surface model misses the tables' height);
- ``preview.png``: a quick-look of the ortho.

The physics is documented in :mod:`pvscan.simulate.scene` and
:mod:`pvscan.simulate.defects`.

Examples
--------
>>> from pvscan.simulate import simulate_flight
>>> res = simulate_flight({"site": {"lon": 8.1, "lat": 47.3},
...                        "defects": {"open_module": 1}}, "/tmp/f", seed=1)  # doctest: +SKIP
>>> res.manifest                                                           # doctest: +SKIP
PosixPath('/tmp/f/flight.toml')
"""
from __future__ import annotations

import logging
import shutil
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from os import PathLike
from pathlib import Path
from typing import Any

from pvscan._typing import ProgressFn
from pvscan.errors import OutputError, SimulationError
from pvscan.simulate.electrical import faiman
from pvscan.simulate.scenario import DEFAULTS, DEFECT_KINDS, Scenario, load_scenario, scenario_from_dict
from pvscan.simulate.scene import Scene

__all__ = ["simulate_flight", "simulate_random", "with_flight", "load_scenario", "scenario_from_dict",
           "SimulationResult", "Scene",
           "build_scene", "faiman", "DEFAULTS", "DEFECT_KINDS"]

log = logging.getLogger(__name__)

#: A scenario mapping, or the path of a scenario TOML file.
ScenarioLike = Mapping[str, Any] | str | PathLike[str]

@dataclass(frozen=True)
class SimulationResult:
    """What :func:`simulate_flight` wrote.

    Attributes
    ----------
    out_dir : Path
    manifest : Path
        ``flight.toml``.
    orthos : tuple of Path
    layout : Path
    truth : Path
        ``truth.geojson``.
    truth_json : Path
    preview : Path
    weather : Path or None
    frames : Path or None
    n_modules : int
    n_defective : int
        Modules with a defect.
    defects : dict
        Number of affected modules per defect pattern.
    seed : int
    scenario : dict
    """

    out_dir: Path
    manifest: Path
    orthos: tuple[Path, ...]
    layout: Path
    truth: Path
    truth_json: Path
    preview: Path
    weather: Path | None
    frames: Path | None
    n_modules: int
    n_defective: int
    defects: dict[str, int] = field(default_factory=dict)
    seed: int = 0
    scenario: Scenario = field(default_factory=dict, repr=False)


def _as_scenario(scenario: ScenarioLike) -> Scenario:
    if isinstance(scenario, Mapping):
        if "_path" in scenario:
            sc = dict(scenario)
            sc.pop("_path")
            return scenario_from_dict(sc, str(scenario["_path"]))
        return scenario_from_dict(scenario)
    return load_scenario(scenario)


def with_flight(scenario: Scenario, *, date: str | None = None, flight_id: str | None = None) -> Scenario:
    """A copy of a loaded scenario flown on another ``date`` (YYYY-MM-DD; the time of day and
    UTC offset kept) and/or under another ``flight_id``.

    Raises
    ------
    SimulationError
        ``date`` is not a calendar date.
    """
    import copy
    from datetime import date as _date

    sc = copy.deepcopy(dict(scenario))
    where = str(sc.get("_path") or "scenario")
    if date is not None:
        try:
            day = _date.fromisoformat(str(date))
        except ValueError:
            raise SimulationError(f"--date {date!r}: not a date (YYYY-MM-DD)") from None
        start = datetime.fromisoformat(str(sc["flight"]["start"]).replace("Z", "+00:00"))
        sc["flight"]["start"] = start.replace(year=day.year, month=day.month, day=day.day).isoformat()
    if flight_id is not None:
        if not str(flight_id).strip():
            raise SimulationError(f"{where}: --flight-id is empty")
        sc["flight"]["id"] = str(flight_id)
    return sc


def build_scene(scenario: ScenarioLike, seed: int = 0) -> Scene:
    """The :class:`Scene` of a scenario (dict or path), without writing anything."""
    sc = _as_scenario(scenario)
    sc.pop("_path", None)
    return Scene(sc, seed)


def _replaceable(path: Path) -> bool:
    if not path.exists():
        return True
    if not path.is_dir():
        return False
    entries = list(path.iterdir())
    return not entries or (path / "truth.json").exists() or (path / "flight.toml").exists()


def simulate_flight(scenario: ScenarioLike, out_dir: str | PathLike[str], seed: int = 0, *, overwrite: bool = False,
                    progress: ProgressFn | None = None) -> SimulationResult:
    """Simulate a flight with ground truth.

    Parameters
    ----------
    scenario : dict or path-like
        A scenario mapping (missing keys take their defaults) or a scenario TOML file.
    out_dir : path-like
        Folder to write. Written in a staging folder and renamed into place only when
        everything succeeded.
    seed : int
        Seed of every random choice: the same seed gives identical files.
    overwrite : bool
        Replace an existing flight folder (one holding ``flight.toml`` or ``truth.json``).
    progress : callable, optional
        ``progress(stage, done, total)``.

    Returns
    -------
    SimulationResult

    Raises
    ------
    SimulationError
        Invalid scenario.
    OutputError
        ``out_dir`` exists and is not empty (without ``overwrite``), or is not a flight folder.
    """
    from pvscan.simulate import writers
    from pvscan.simulate.truth import module_truth

    out_dir = Path(out_dir)
    if int(seed) < 0:
        raise SimulationError(f"seed {seed}: must be zero or positive")
    occupied = out_dir.exists() and (not out_dir.is_dir() or any(out_dir.iterdir()))
    if occupied:
        if not overwrite:
            raise OutputError(f"{out_dir}: exists and is not empty (use --overwrite to replace it)")
        if not _replaceable(out_dir):
            raise OutputError(f"{out_dir}: is not a simulated flight folder; refusing to replace it")
    sc = _as_scenario(scenario)
    src = sc.pop("_path", None)
    try:
        scene = Scene(sc, seed)
    except (ValueError, KeyError) as exc:
        raise SimulationError(f"{src or 'scenario'}: {exc}") from None
    log.info("simulating %d modules, %d x %d px at %.3f m", scene.field.n_modules, scene.width,
             scene.height, scene.gsd)
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", dir=out_dir.parent))
    try:
        orthos, ortho_keys, preview = writers.write_orthos(scene, stage, progress)
        layout_name = writers.write_layout(scene, stage)
        writers.write_truth_ortho(scene, stage)
        write_frames = sc["flight"]["write_frames"]
        varying = scene.weather.varying
        frames_name = writers.write_frames(scene, stage) if (write_frames is True or
                                                             (write_frames == "auto" and varying)) else None
        weather_name = writers.write_weather(scene, stage) if varying else None
        manifest = writers.write_manifest(scene, stage, orthos, ortho_keys, layout_name, frames_name, weather_name)
        if progress is not None:
            progress("truth", 0, 1)
        truth = module_truth(scene)
        if progress is not None:
            progress("truth", 1, 1)
        counts = {k: int(sum(1 for d in scene.defects if d.kind == k)) for k in DEFECT_KINDS}
        extra = {
            "seed": int(seed),
            "scenario": src,
            "site": sc["site"]["name"],
            "n_modules": scene.field.n_modules,
            "defect_modules": counts,
            "epsg": scene.field.epsg,
            "gsd_m": scene.gsd,
            "temp_sky_c": round(scene.temp_sky, 4),
            "sun_elevation_deg": round(scene.sun_elevation_deg, 3),
            "sun_azimuth_deg": round(scene.sun_azimuth_deg, 3),
            "u0": scene.u0, "u1": scene.u1,
            "seams": [list(s) for s in scene.seams],
            "hot_objects": [{"kind": o[0], "rise_k": round(o[5], 3)} for o in scene.objects],
            "cloud_shadows": len(scene.clouds),
            "row_shaded_modules": int(scene.row_shade.any.sum()) if scene.row_shade is not None else 0,
            "seam_shift_m": [[round(float(a), 4) for a in d] for d in scene.seam_shift],
            "reflections": len(scene.reflections),
            "scenario_settings": sc,
        }
        truth_name, truth_json = writers.write_truth(scene, truth, stage, extra)
        writers.write_preview(preview, stage / "preview.png",
                              f"{sc['site']['name']}: apparent temperature (simulated, seed {seed})")
        if out_dir.exists():
            if out_dir.is_dir():
                shutil.rmtree(out_dir)
            else:
                out_dir.unlink()
        stage.rename(out_dir)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    return SimulationResult(
        out_dir=out_dir, manifest=out_dir / manifest, orthos=tuple(out_dir / o for o in orthos),
        layout=out_dir / layout_name, truth=out_dir / truth_name, truth_json=out_dir / truth_json,
        preview=out_dir / "preview.png", weather=out_dir / weather_name if weather_name else None,
        frames=out_dir / frames_name if frames_name else None, n_modules=scene.field.n_modules,
        n_defective=len(scene.defects), defects=counts, seed=int(seed), scenario=sc)


def simulate_random(seed: int, out_dir: str | PathLike[str], family: str = "any", *, overwrite: bool = False,
                    progress: ProgressFn | None = None) -> SimulationResult:
    """Simulate a random flight of a family (:mod:`pvscan.simulate.sampler`) with ground truth.

    The drawn scenario is written into the flight folder as ``scenario.toml``;
    ``pvscan simulate DIR/scenario.toml --seed SEED`` replays the flight file for file.

    Parameters
    ----------
    seed : int
        Seed of the draw and of the simulation.
    out_dir : path-like
        Flight folder (as :func:`simulate_flight`).
    family : str
        One of :data:`pvscan.simulate.sampler.FAMILIES`.
    """
    import os

    from pvscan.simulate.sampler import draw_scenario
    from pvscan.simulate.writers import toml_dumps

    if int(seed) < 0:
        raise SimulationError(f"--random {seed}: must be zero or positive")
    drawn = draw_scenario(int(seed), family)
    res = simulate_flight(drawn, out_dir, seed=int(seed), overwrite=overwrite, progress=progress)
    header = (f"Scenario drawn by pvscan simulate --random {int(seed)} --family {family}.\n"
              f"Replay: pvscan simulate scenario.toml --seed {int(seed)} --out DIR")
    tmp = res.out_dir / ".scenario.toml.part"
    tmp.write_text(toml_dumps(drawn, header), encoding="utf-8")
    os.replace(tmp, res.out_dir / "scenario.toml")
    return res
