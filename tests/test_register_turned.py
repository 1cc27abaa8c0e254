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
from register_flights import RIGHT_M, flight_seed, median_error_m, register_whole, simulate_plant, truth_placement

from pvscan.measure.register import apply_placement

#: Seed of the flights: 760000 in the suite's default run, another draw for any other seed
#: (kept non-negative for any PVSCAN_TEST_SEED).
FLIGHT_SEED = flight_seed(760000)


@pytest.fixture(scope="module", params=["turned_layout", "any"])
def plant(request, tmp_path_factory):
    return request.param, simulate_plant(tmp_path_factory, 760000, request.param)


def test_layout_is_placed_on_its_modules_or_flagged(plant):
    """The whole registration: the layout is placed on its own modules and the registration
    check passes, or the check fails; a wrong placement never passes. In the default run (the
    flights that were refused) it is placed and passes."""
    family, d = plant
    _, mods, reg, err, check = register_whole(d)
    # the truth is a similarity here: within centimetres of every module
    assert median_error_m(d, apply_placement(mods, truth_placement(d, mods))) < 0.1
    assert err < RIGHT_M or check["passed"] is False, (family, err, reg.message)
    if FLIGHT_SEED == 760000:
        assert reg.status == "ok" and check["passed"] is True and err < RIGHT_M, (family, err, reg.message)


def test_screen_of_turned_starts_puts_the_truth_first(plant):
    """The cheap first look that orders the turned starts (only the first
    ``retry_turn_max_fits`` are fitted) ranks the start at the true placement ahead of the same
    start turned by whole retry steps either way (each moves the farthest module half a
    module's short side: common practice for the reach of the fit, see ``retry_turn_fraction``).
    The truth is the simulator's (truth_ortho.geojson), which no registration code reads; it is
    listed last so that order alone cannot put it first."""
    from pvscan.io.layout import read_layout
    from pvscan.io.manifest import load_flight
    from pvscan.io.ortho import open_orthos
    from pvscan.io.settings import load_pipeline
    from pvscan.measure.register._blocks import _settings
    from pvscan.measure.register._pitch import _screen_turned, _turned
    from pvscan.measure.register.fit import _reduce_for, _sample_at

    _, d = plant
    cfg = _settings(load_pipeline())
    fl = load_flight(d / "flight.toml")
    with open_orthos(fl.flight.orthos, fl.ortho) as o:
        mods = read_layout(fl, o.crs)
        truth = truth_placement(d, mods)
        turned = _turned(mods, [truth], cfg)[:4]  # one and two steps either way
        assert len(turned) == 4
        red = _reduce_for(o, cfg)
        order = _screen_turned(turned + [truth], cfg, lambda p: _sample_at(o, mods, p, cfg, reduce=red))
    assert order[0] == truth, [(p.theta_deg, truth.theta_deg) for p in order]
