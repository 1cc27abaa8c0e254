"""Shared set-up of the registration tests on simulated flights (test_register_ends,
test_register_ends_confirm, test_register_relief, test_register_turned, test_register_glass_ends,
test_register_pitch_support).

Where the modules are is the simulator's truth (truth_ortho.geojson: the modules where the
ortho shows them), which no registration code reads.
"""
from __future__ import annotations

import contextlib
import math
from collections.abc import Iterator
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import geopandas as gpd
import numpy as np
import pytest
import shapely
from conftest import DEFAULT_TEST_SEED, test_seed

from pvscan.io.layout import read_layout
from pvscan.io.manifest import load_flight
from pvscan.io.ortho import open_orthos
from pvscan.io.settings import load_pipeline
from pvscan.measure.register import Placement, apply_placement, expected_module_apparent_c, register_layout
from pvscan.measure.register._blocks import _settings
from pvscan.measure.register._place import _use_placement
from pvscan.measure.register._records import Registration
from pvscan.measure.register.evidence import sun_vector
from pvscan.measure.register.fit import _resolve_pitch
from pvscan.measure.validity import registration_check
from pvscan.simulate import simulate_flight
from pvscan.simulate.sampler import draw_scenario

#: A placement is right when the median module centre is within a quarter of a module width of
#: the truth (common practice; the plants' modules are 1.0-1.1 m wide; one pitch off is ~1.06 m).
RIGHT_M = 0.25

#: A small random plant may leave the simulator fewer free modules than the scenario asks defects
#: for; it warns and places fewer. Registration tests on such plants set ``pytestmark`` to this.
FEWER_DEFECTS_OK = pytest.mark.filterwarnings(
    "ignore:defects\\.[a-z_]+. no free module left:pvscan.errors.PvscanWarning")


def flight_seed(scenario_seed: int) -> int:
    """The simulator seed of a test's flight: ``scenario_seed`` (the random plant's own seed) in
    the suite's default run, another draw for any other PVSCAN_TEST_SEED (non-negative)."""
    return test_seed(scenario_seed - DEFAULT_TEST_SEED) % 2**31


def simulate_plant(tmp_path_factory: Any, scenario_seed: int, family: str) -> Path:
    """The random plant ``pvscan simulate --random SCENARIO_SEED --family FAMILY`` flown with
    :func:`flight_seed`; the flight folder."""
    d = tmp_path_factory.mktemp(f"{family}-{scenario_seed}") / "flight"
    simulate_flight(draw_scenario(scenario_seed, family), d, seed=flight_seed(scenario_seed))
    return d


def plant_fixture(scenario_seed: int, family: str) -> Any:
    """A module-scoped fixture ``plant``: the folder of :func:`simulate_plant`'s flight."""

    @pytest.fixture(scope="module")
    def plant(tmp_path_factory: Any) -> Path:
        return simulate_plant(tmp_path_factory, scenario_seed, family)

    return plant


def module_errors_m(d: Path, placed: gpd.GeoDataFrame) -> np.ndarray:
    """Distance between each placed module centre and the truth in the ortho [m]."""
    truth = gpd.read_file(d / "truth_ortho.geojson").to_crs(placed.crs).set_index("module_id")
    p = placed.set_index("module_id")
    tc = shapely.centroid(truth.loc[p.index].geometry.values)
    pc = shapely.centroid(p.geometry.values)
    return np.asarray(shapely.distance(tc, pc), float)


def median_error_m(d: Path, placed: gpd.GeoDataFrame) -> float:
    """Median distance between placed module centres and the truth in the ortho [m]."""
    return float(np.median(module_errors_m(d, placed)))


def truth_placement(d: Path, mods: gpd.GeoDataFrame) -> Placement:
    """The similarity carrying the layout's module centres onto the truth's (least squares)."""
    truth = gpd.read_file(d / "truth_ortho.geojson").to_crs(mods.crs).set_index("module_id")
    a = shapely.centroid(mods.geometry.values)
    b = shapely.centroid(truth.loc[mods["module_id"].astype(str)].geometry.values)
    b0 = mods.total_bounds
    c = complex((b0[0] + b0[2]) / 2.0, (b0[1] + b0[3]) / 2.0)
    za = shapely.get_x(a) + 1j * shapely.get_y(a) - c
    zb = shapely.get_x(b) + 1j * shapely.get_y(b) - c
    am, bm = za.mean(), zb.mean()
    k = np.vdot(za - am, zb - bm) / np.vdot(za - am, za - am)
    t = bm - k * am
    return Placement(float(t.real), float(t.imag), math.degrees(float(np.angle(k))), float(abs(k)), c.real, c.imag)


def sun(fl: Any, mods: gpd.GeoDataFrame, *, at_start: bool = False) -> Any:
    """The sun (pvlib's position, as the registration takes it) over the plant's centroid, in
    the middle of the flight (or at its start)."""
    c = mods.to_crs(4326).union_all().centroid
    when = fl.flight.start if at_start else fl.flight.start + (fl.flight.end - fl.flight.start) / 2
    return sun_vector(c.x, c.y, when)


def register_whole(d: Path, *, sun_at_start: bool = False,
                   register: dict | None = None) -> tuple[Any, gpd.GeoDataFrame, Any, float, dict]:
    """The whole registration of the flight in ``d`` with the default pipeline settings (the
    ``[register]`` keys of ``register`` over them): (flight, layout modules, registration, median
    module error of the placement used [m], registration check)."""
    st = load_pipeline()
    reg_settings = {"register": {**st["register"], **register}} if register else st
    fl = load_flight(d / "flight.toml")
    with open_orthos(fl.flight.orthos, fl.ortho) as o:
        mods = read_layout(fl, o.crs)
        reg = register_layout(o, mods, reg_settings, sun=sun(fl, mods, at_start=sun_at_start),
                              expected_apparent_c=expected_module_apparent_c(fl, st, strict=False))
    err = median_error_m(d, apply_placement(mods, reg.placement if reg.applied else None))
    return fl, mods, reg, err, registration_check(reg, reg_settings)


def assert_pitch_rule_right(d: Path, rule: str, default_run: bool) -> None:
    """The whole registration of the flight in ``d``: a placement that passes the registration
    check is on its own modules (within :data:`RIGHT_M`, a quarter of a module width, common
    practice); one a one-pitch rule (``evidence.pitch[rule]``) used is right. In the default run
    (``default_run``: the flight that rule was made for, refused before it) the rule decides, the
    module evidence alone does not, and the placement is right and passes."""
    _, _, reg, err, check = register_whole(d)
    pitch = (reg.evidence or {}).get("pitch") or {}
    assert err < RIGHT_M or check["passed"] is False, (err, reg.message, pitch)
    if pitch.get(rule):
        assert err < RIGHT_M and reg.status == "ok", (err, reg.message, pitch)
    if default_run:
        assert pitch.get(rule) and not pitch.get("decisive"), (reg.message, pitch)
        assert reg.status == "ok" and check["passed"] is True and err < RIGHT_M, (err, reg.message, pitch)


@contextlib.contextmanager
def plant_at_truth(d: Path) -> Iterator[SimpleNamespace]:
    """The flight in ``d`` opened with the default pipeline settings, for the one-pitch tests:
    ``st``, ``cfg`` (the registration's settings), ``fl``, ``o`` (the open orthos), ``mods``,
    ``truth`` (the simulator's placement, :func:`truth_placement`), ``ident`` (no correction about
    the truth's centre), ``expected`` (the modules' expected apparent temperature) and ``sun``."""
    st = load_pipeline()
    fl = load_flight(d / "flight.toml")
    with open_orthos(fl.flight.orthos, fl.ortho) as o:
        mods = read_layout(fl, o.crs)
        truth = truth_placement(d, mods)
        yield SimpleNamespace(st=st, cfg=_settings(st), fl=fl, o=o, mods=mods, truth=truth,
                              ident=Placement(cx=truth.cx, cy=truth.cy),
                              expected=expected_module_apparent_c(fl, st, strict=False), sun=sun(fl, mods))


def resolve_pitch_at(p: SimpleNamespace, placement: Placement, message: str, *, switch: bool = True) -> Registration:
    """The one-pitch decision (:func:`pvscan.measure.register._pitch._resolve_pitch`) of the plant
    ``p`` (:func:`plant_at_truth`) with ``placement`` used: the registration it leaves. Without
    ``switch`` an undecided placement never gives way to one a module pitch away
    (``pitch_switch_ratio`` 0): the tests of the decision's own rules."""
    reg = Registration(evidence={}, status="ok", message=message)
    _use_placement(reg, placement)
    cfg = p.cfg if switch else {**p.cfg, "pitch_switch_ratio": 0.0}
    _resolve_pitch(p.o, p.mods, reg, cfg, p.ident, p.sun, p.expected)
    return reg
