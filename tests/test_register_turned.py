"""Two right placements the registration refused: a turned layout on a long site, and table
ends with the tables' shadows beyond them.

``pvscan simulate --random 760000 --family turned_layout``: a fixed plant of 2 x 3 tables of 3 x
14 landscape modules, 98 m long and 17 m wide, whose layout is drawn turned 0.9 deg, scaled
0.8 % and 0.5 m off. The block correlation sees the site as one or two blocks (a shift, not
the turn); the fit from its proposals never reached the truth (a degree of turn puts the far
modules 0.8 m off), and the layout was refused, although at the true placement the footprints
sit on glass. ``--family any`` with the same seed: 3 x 3 fixed tables of 3 x 14 portrait
modules near noon, the tables' shadows on the ground beyond their western ends; the layout was
placed right (a few centimetres) and the module evidence held it decisive, but the table ends
voted -0.24 for a placement one module pitch away and it was refused.

Simulated with seed 760000 (the suite's default seed shifted, see :data:`FLIGHT_SEED`); other
PVSCAN_TEST_SEED values draw other noise, defects and distractors on the same plants, and the
checks must hold for every one: the placement is right, or the registration check fails. Where
the modules are is the simulator's truth (truth_ortho.geojson: the modules where the ortho
shows them), which no registration code reads.
"""
from __future__ import annotations

import pytest
from conftest import DEFAULT_TEST_SEED, test_seed
from test_register_ends import _truth_placement
from test_register_relief import _median_error_m, _sun

from pvscan.io.layout import read_layout
from pvscan.io.manifest import load_flight
from pvscan.io.ortho import open_orthos
from pvscan.io.settings import load_pipeline
from pvscan.measure.register import apply_placement, expected_module_apparent_c, register_layout
from pvscan.measure.validity import registration_check
from pvscan.simulate import simulate_flight
from pvscan.simulate.sampler import draw_scenario

#: Seed of the flights: 760000 in the suite's default run, another draw for any other seed
#: (kept non-negative for any PVSCAN_TEST_SEED).
FLIGHT_SEED = test_seed(760000 - DEFAULT_TEST_SEED) % 2**31
#: A placement is right when the median module centre is within a quarter of a module
#: width of the truth (common practice; the plants' modules are 1.0-1.1 m wide).
RIGHT_M = 0.25


@pytest.fixture(scope="module", params=["turned_layout", "any"])
def plant(request, tmp_path_factory):
    d = tmp_path_factory.mktemp(request.param) / "flight"
    simulate_flight(draw_scenario(760000, request.param), d, seed=FLIGHT_SEED)
    return request.param, d


def test_layout_is_placed_on_its_modules_or_flagged(plant):
    """The whole registration: the layout is placed on its own modules and the registration
    check passes, or the check fails; a wrong placement never passes. In the default run (the
    flights that were refused) it is placed and passes."""
    family, d = plant
    st = load_pipeline()
    fl = load_flight(d / "flight.toml")
    with open_orthos(fl.flight.orthos, fl.ortho) as o:
        mods = read_layout(fl, o.crs)
        true = _truth_placement(d, mods)
        # the truth is a similarity here: within centimetres of every module
        assert _median_error_m(d, apply_placement(mods, true)) < 0.1
        reg = register_layout(o, mods, st, sun=_sun(fl, mods),
                              expected_apparent_c=expected_module_apparent_c(fl, st, strict=False))
    err = _median_error_m(d, apply_placement(mods, reg.placement if reg.applied else None))
    check = registration_check(reg, st)
    assert err < RIGHT_M or check["passed"] is False, (family, err, reg.message)
    if FLIGHT_SEED == 760000:
        assert reg.status == "ok" and check["passed"] is True and err < RIGHT_M, (family, err, reg.message)
