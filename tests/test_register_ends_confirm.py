"""A placement the module evidence leaves ambiguous by one module pitch, confirmed by the table ends.

The flight is a random plant of the simulator (``pvscan simulate --random 830002 --family
tracker_hot_ground_noon``: single-axis tracker tables near noon over ground hotter than the
glass). Simulated with seed 830002 (the suite's default seed shifted, see :data:`FLIGHT_SEED`),
the layout was placed 3 cm from the truth, but the module evidence of the placement one module
pitch along the rows was within 10 % of it (ratio 1.09), so the registration was ambiguous and
the flight refused, though every table end voted for the placement (0.48). Other
PVSCAN_TEST_SEED values draw other noise, defects and distractors on the same plant; the checks
below must hold for every one.

Where the modules are is the simulator's truth (truth_ortho.geojson), which no registration
code reads.
"""
from __future__ import annotations

import pytest
from register_flights import RIGHT_M, flight_seed, register_whole, simulate_plant

#: Seed of the flight: 830002 in the suite's default run, another draw for any other seed
#: (kept non-negative for any PVSCAN_TEST_SEED).
FLIGHT_SEED = flight_seed(830002)


@pytest.fixture(scope="module")
def plant(tmp_path_factory):
    return simulate_plant(tmp_path_factory, 830002, "tracker_hot_ground_noon")


def test_placement_confirmed_by_the_table_ends_is_right(plant):
    """The whole registration: a placement that passes the registration check is on its own
    modules (within a quarter of a module width, common practice); a placement the table ends
    confirm against one pitch away is right. In the default run (the flight that was refused)
    it is placed and passes."""
    _, _, reg, err, check = register_whole(plant)
    pitch = (reg.evidence or {}).get("pitch") or {}
    assert err < RIGHT_M or check["passed"] is False, (err, reg.message, pitch)
    if pitch.get("ends_confirm"):
        assert err < RIGHT_M and reg.status == "ok", (err, reg.message, pitch)
    if FLIGHT_SEED == 830002:
        assert reg.status == "ok" and check["passed"] is True and err < RIGHT_M, (err, reg.message, pitch)
