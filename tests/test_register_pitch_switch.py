"""An undecided placement gives way to the placement one module pitch away that is decided.

The flight is a random plant of the simulator (``pvscan simulate --random 1925000 --family
tracker_hot_ground_noon``: flat single-axis tracker rows over hot bare ground at noon, the layout
drawn 0.68 m off). Simulated with seed 1925000 (the suite's default seed shifted, see
:data:`FLIGHT_SEED`), the fit landed one module pitch along the rows off the truth (1.07 m): the
placement one pitch back fitted the modules better (evidence ratio 0.91) and the table ends voted
against the placement used (-0.73), so the flight was refused, though the right placement was the
alternative the decision had weighed. Judged in its own right that alternative passes the same
one-pitch decision (its table ends and the glass beyond them for it), and it is now used. Other
PVSCAN_TEST_SEED values draw other noise, defects and distractors on the same plant; the checks
below must hold for every one.

Where the modules are is the simulator's truth (truth_ortho.geojson), which no registration code
reads. A placement is right within a quarter of a module width (common practice; one module pitch
is 1.0-1.2 m). A layout that is right must not be moved: by no more than 3 cm (issue 14: on a flight
whose layout is right the fitted correction stays within 3 cm of none; a third of a pixel of a
5-10 cm thermal ortho, common practice). Which side of a table is in its own shadow comes from
pvlib's solar position (NREL SPA, Reda and Andreas 2004), the source the registration itself uses.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np
from register_flights import (
    FEWER_DEFECTS_OK,
    RIGHT_M,
    flight_seed,
    median_error_m,
    module_errors_m,
    plant_at_truth,
    plant_fixture,
    register_whole,
    resolve_pitch_at,
)

from pvscan.io.settings import load_pipeline
from pvscan.measure.register import apply_placement
from pvscan.measure.register._blocks import _settings
from pvscan.measure.register.ends import pitch_steps

#: Seed of the flight: 1925000 (the flight described above) in the suite's default run, another
#: draw for any other PVSCAN_TEST_SEED (kept non-negative).
FLIGHT_SEED = flight_seed(1925000)

#: Largest move of a right placement by the one-pitch decision [m] (issue 14, see above).
NO_MOVE_M = 0.03

pytestmark = FEWER_DEFECTS_OK

plant = plant_fixture(1925000, "tracker_hot_ground_noon")


def p_limit() -> float:
    """The table-end vote below which the ends prefer a placement one pitch away (``ends_min_vote``) [-]."""
    return float(_settings(load_pipeline())["ends_min_vote"])


def test_whole_registration_is_right_or_flagged(plant):
    """The whole registration: a placement that passes the registration check is on its own
    modules, and one the decision moved a module pitch to is right. In the default run (the flight
    refused one pitch off before) the placement gives way to the one a pitch back, which is right,
    ok, and passes."""
    _, _, reg, err, check = register_whole(plant)
    pitch = (reg.evidence or {}).get("pitch") or {}
    sw = pitch.get("switch") or {}
    assert err < RIGHT_M or check["passed"] is False, (err, reg.message, pitch)
    if sw.get("used"):
        assert err < RIGHT_M and reg.status == "ok" and reg.evidence["used"] == "pitch", (err, reg.message, sw)
    if FLIGHT_SEED == 1925000:
        assert sw.get("used") and sw["before"]["ends_lowest"] < p_limit(), (reg.message, sw)
        assert reg.status == "ok" and check["passed"] is True and err < RIGHT_M, (err, reg.message, pitch)


def test_placement_one_pitch_off_gives_way_only_to_the_truth(plant):
    """The plant placed one module pitch off along its rows, either way (the truth's own placement
    moved by the pitch, each table's residual kept): the decision either flags it or moves it to
    the right placement, never calls a wrong one ok. Where the truth passes the decision in its own
    right and fits the modules better than the placement one pitch off, the decision moves there."""
    with plant_at_truth(plant) as p:
        truth = p.truth
        at_truth = resolve_pitch_at(p, truth, "placed at the truth", switch=False)
        dirs, steps = pitch_steps(p.mods)
        moved = 0
        for d, v in zip(dirs, steps):
            if d != "along":
                continue
            off = replace(truth, tx=truth.tx + float(v[0]), ty=truth.ty + float(v[1]))
            assert median_error_m(plant, apply_placement(p.mods, off)) > RIGHT_M  # it is one pitch off
            reg = resolve_pitch_at(p, off, "placed one pitch off")
            pitch = reg.evidence["pitch"]
            sw = pitch.get("switch") or {}
            err = median_error_m(plant, apply_placement(p.mods, reg.placement))
            assert reg.status != "ok" or err < RIGHT_M, (v, err, reg.message, pitch)
            if sw.get("used"):
                assert err < RIGHT_M and reg.status == "ok", (v, err, reg.message, sw)
                assert sw["ratio"] <= p.cfg["pitch_switch_ratio"], sw
                moved += 1
            elif at_truth.status == "ok" and np.allclose(sw.get("moved_m", [np.nan] * 2), -v, atol=1e-3):
                raise AssertionError(f"the truth, decided in its own right, was tried and not used: {sw}")
        if FLIGHT_SEED == 1925000:
            assert at_truth.status == "ok" and moved >= 1, (at_truth.message, moved)


def test_right_placement_is_not_moved(plant):
    """At the truth (each table's residual kept) the decision leaves the placement where it is,
    within 3 cm for every module, decided or not: a right layout is never moved a pitch away."""
    with plant_at_truth(plant) as p:
        reg = resolve_pitch_at(p, p.truth, "placed at the truth")
        before = module_errors_m(plant, apply_placement(p.mods, p.truth))
        after = module_errors_m(plant, apply_placement(p.mods, reg.placement))
        assert float(np.max(np.abs(after - before))) <= NO_MOVE_M, (reg.message, reg.evidence["pitch"])
        assert not (reg.evidence["pitch"].get("switch") or {}).get("used"), reg.evidence["pitch"]
