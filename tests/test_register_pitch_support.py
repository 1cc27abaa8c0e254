"""A placement neither one-pitch test decides alone, used when both lean its way.

The flight is a random plant of the simulator (``pvscan simulate --random 1040000 --family
small_site``: tracker rows of portrait modules, 64 modules). Simulated with seed 1040000 (the
suite's default seed shifted, see :data:`FLIGHT_SEED`), the layout was placed 3 cm from the truth
(median module error), but the placement one module pitch along the rows had module evidence
only 1.08 times the placement's (1.10 needed to decide) and the table ends voted -0.05 at the
lowest (0.1 needed to confirm): the flight was refused though the placement was right. Every
placement one pitch away fitted the modules worse, and no table end preferred one of them.
Other PVSCAN_TEST_SEED values draw other noise, defects and distractors on the same plant; the
checks below must hold for every one.

Where the modules are is the simulator's truth (truth_ortho.geojson), which no registration
code reads. A placement is right within a quarter of a module width (common practice).
"""
from __future__ import annotations

from dataclasses import replace

from register_flights import (
    FEWER_DEFECTS_OK,
    RIGHT_M,
    assert_pitch_rule_right,
    flight_seed,
    median_error_m,
    plant_at_truth,
    plant_fixture,
    resolve_pitch_at,
)

from pvscan.measure.register import apply_placement
from pvscan.measure.register._pitch import _pitches

#: Seed of the flight: 1040000 (the flight described above) in the suite's default run, another
#: draw for any other PVSCAN_TEST_SEED (kept non-negative).
FLIGHT_SEED = flight_seed(1040000)

# a small plant: the simulator may place fewer defects than the scenario asks, and says so
pytestmark = FEWER_DEFECTS_OK


plant = plant_fixture(1040000, "small_site")


def test_placement_both_tests_lean_to_is_right(plant):
    """The whole registration: a placement that passes the registration check is on its own
    modules; one used because both tests lean its way is right. In the default run (the flight
    that was refused) it is placed, right, and passes."""
    assert_pitch_rule_right(plant, "both_lean", FLIGHT_SEED == 1040000)


def test_placement_one_pitch_off_is_not_used_on_the_lean(plant):
    """The same plant placed one module pitch off along its rows, either way (the truth's own
    placement moved by the pitch): the module evidence prefers the truth to it or a table end
    prefers the truth, so the two do not lean its way, and it is not called ok."""
    with plant_at_truth(plant) as p:
        truth = p.truth
        along = _pitches(p.mods)[0]
        for sgn in (1.0, -1.0):
            off = replace(truth, tx=truth.tx + sgn * float(along[0]), ty=truth.ty + sgn * float(along[1]))
            assert median_error_m(plant, apply_placement(p.mods, off)) > RIGHT_M  # it is one pitch off
            reg = resolve_pitch_at(p, off, "placed one pitch off", switch=False)
            pitch = reg.evidence["pitch"]
            assert not pitch["both_lean"], (sgn, pitch)
            assert reg.status != "ok", (sgn, reg.message, pitch)
