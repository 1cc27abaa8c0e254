"""Footprints on their modules in an ortho built on a ground-level surface model.

The flight is a random plant of the simulator (``pvscan simulate --random 720000 --family
tracker_hot_ground_noon``: three single-axis tracker tables of 10 portrait modules in three
rows, mounted 1.33 m high, flown at 47 m near noon over ground hotter than the glass). Its
ortho was rectified on the ground: every raised point is displaced away from the nadir of
the frame it was taken from by ``d = r h / H`` (Wolf, Dewitt & Wilkinson, *Elements of
Photogrammetry*, vertical photographs), up to a metre here, with steps where frames meet.
Simulated with seed 720000 (the suite's default seed shifted, see :data:`FLIGHT_SEED`) the
layout, drawn 1 m off, was refused: at the true placement the probe ratio along the modules'
long side was 0.68 against the limit 0.6 (the modules blurred across the frame steps keep a
large spread of their own, which a 0.2 m probe hardly changes). Other PVSCAN_TEST_SEED values
draw other noise, defects and distractors on the same plant; the checks below must hold for
every one.

Where the modules are is the simulator's truth (truth_ortho.geojson: the modules where the
ortho shows them), which no registration code reads.
"""
from __future__ import annotations

import pytest
from register_flights import RIGHT_M, flight_seed, median_error_m, register_whole, sun, truth_placement

from pvscan.io.layout import read_layout
from pvscan.io.manifest import load_flight
from pvscan.io.ortho import open_orthos
from pvscan.io.settings import load_pipeline
from pvscan.measure.register import Placement, apply_placement
from pvscan.measure.register._blocks import _settings
from pvscan.measure.register.evidence import _unit_axes, placement_quality, sample_modules
from pvscan.simulate import simulate_flight
from pvscan.simulate.sampler import draw_scenario

#: Seed of the flight: 720000 in the suite's default run, another draw for any other seed
#: (kept non-negative for any PVSCAN_TEST_SEED).
FLIGHT_SEED = flight_seed(720000)
#: A placement this far off along or across the modules is wrong: more than a quarter of a
#: module width (common practice), well beyond the centimetres of a right one.
WRONG_M = 0.3


@pytest.fixture(scope="module")
def plant(tmp_path_factory):
    d = tmp_path_factory.mktemp("relief") / "flight"
    sc = draw_scenario(720000, "tracker_hot_ground_noon")
    assert float(sc["ortho"]["relief_height_fraction"]) == 1.0  # rectified on the ground
    simulate_flight(sc, d, seed=FLIGHT_SEED)
    return d


def test_true_placement_sits_on_glass_and_a_wrong_one_does_not(plant):
    """At the true placement (the similarity fitted to the truth) the footprints count as on
    their modules; the same placement 0.3 m off along or across the modules does not."""
    cfg = _settings(load_pipeline())
    fl = load_flight(plant / "flight.toml")
    with open_orthos(fl.flight.orthos, fl.ortho) as o:
        mods = read_layout(fl, o.crs)
        true = truth_placement(plant, mods)
        assert median_error_m(plant, apply_placement(mods, true)) < 0.1
        sample = sample_modules(o, apply_placement(mods, true), n=int(cfg["evidence_modules"]),
                                margin_m=float(cfg["evidence_margin_m"]), seed=0)
    sun_dir = sun(fl, mods)
    at = Placement(cx=true.cx, cy=true.cy)  # the sample was read at the truth: identity relative to it
    q = placement_quality(sample, at, cfg, sun=sun_dir)
    assert q["ok"], q
    for ax in _unit_axes(sample):
        for s in (1.0, -1.0):
            off = at.moved(tx=s * WRONG_M * float(ax[0]), ty=s * WRONG_M * float(ax[1]))
            qo = placement_quality(sample, off, cfg, sun=sun_dir)
            assert not qo["ok"], (s, ax, qo)


def test_layout_is_placed_on_its_modules_or_flagged(plant):
    """The whole registration: the layout (drawn about 1 m off) is placed on its own modules
    and the registration check passes, or the check fails; a wrong placement never passes. In
    the default run (the flight that was refused) it is placed and passes."""
    _, _, reg, err, check = register_whole(plant)
    assert err < RIGHT_M or check["passed"] is False, (err, reg.message)
    if FLIGHT_SEED == 720000:
        assert reg.status == "ok" and check["passed"] is True and err < RIGHT_M, (err, reg.message)
