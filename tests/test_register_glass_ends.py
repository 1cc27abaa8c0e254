"""Glass at the sunlit table ends tells a placement from one a module pitch away.

The flight is a random plant of the simulator (``pvscan simulate --random 1020000 --family
tracker``: six single-row tracker tables of twelve modules, two tables end to end per row, the
sun in the east). Simulated with seed 1020000 (the suite's default seed shifted, see
:data:`FLIGHT_SEED`), the layout was placed 4 cm from the truth (median module error), but the
placement one module pitch along the rows had module evidence only 1.09 times the placement's
(1.10 needed to decide) and the rank-correlation vote of the table ends was -0.52 (one free end
per table, three tables a direction): the flight was refused though the placement was right.
The end modules of each table read as glass and the ground beyond the free, sunlit ends did
not; a placement one pitch short or long has glass in both cells or in neither. Other
PVSCAN_TEST_SEED values draw other noise, defects and distractors on the same plant; the checks
below must hold for every one.

Where the modules are is the simulator's truth (truth_ortho.geojson), which no registration
code reads. A placement is right within a quarter of a module width (common practice). Which
side of a table is in its own shadow comes from pvlib's solar position (NREL SPA, Reda and
Andreas 2004), the source the registration itself uses.
"""
from __future__ import annotations

import datetime as dt
from dataclasses import replace

import geopandas as gpd
import numpy as np
import shapely
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

from pvscan.io.settings import load_pipeline
from pvscan.measure.register import apply_placement
from pvscan.measure.register._blocks import _settings
from pvscan.measure.register.ends import pitch_steps, sunlit_ends
from pvscan.measure.register.evidence import sun_vector

#: Seed of the flight: 1020000 (the flight described above) in the suite's default run, another
#: draw for any other PVSCAN_TEST_SEED (kept non-negative).
FLIGHT_SEED = flight_seed(1020000)

pytestmark = FEWER_DEFECTS_OK

plant = plant_fixture(1020000, "tracker")


def _line_east_west(n: int = 4, pitch_m: float = 1.1) -> gpd.GeoDataFrame:
    """One line of ``n`` modules 1.0 m x 2.0 m running east, ``pitch_m`` apart [m]."""
    rows = []
    for i in range(n):
        x0 = i * pitch_m
        rows.append({"table_id": "T1", "table_row": 1, "table_col": i + 1, "fx0": x0, "fy0": 0.0, "fux": 1.0,
                     "fuy": 0.0, "fvx": 0.0, "fvy": 2.0, "geometry": shapely.box(x0, 0.0, x0 + 1.0, 2.0)})
    return gpd.GeoDataFrame(rows, geometry="geometry", crs="EPSG:32632")


def test_the_end_away_from_a_morning_sun_is_in_the_shadow():
    """pvlib's sun at 07:00 local solar time in June at 48 N stands in the east-north-east, low: the
    west end of an east-running line (beyond its first module) is in the table's shadow, the east
    end (beyond its last) is lit; at 17:00 the other way round. Source: pvlib solar position."""
    mods = _line_east_west()
    lines = [(0, len(mods) - 1, len(mods))]
    cos = float(_settings(load_pipeline())["ends_glass_shadow_cos"])
    tz = dt.timezone(dt.timedelta(hours=1))  # about local solar time at 15 E
    morning = sun_vector(15.0, 48.0, dt.datetime(2024, 6, 21, 8, 0, tzinfo=tz))
    evening = sun_vector(15.0, 48.0, dt.datetime(2024, 6, 21, 18, 0, tzinfo=tz))
    assert morning[0] > 0.5 and evening[0] < -0.5 and 0 < morning[2] < 45, (morning, evening)
    lit_am = sunlit_ends(mods, lines, morning, cos)
    lit_pm = sunlit_ends(mods, lines, evening, cos)
    assert lit_am is not None and lit_pm is not None
    assert lit_am.tolist() == [[True, False]], lit_am  # beyond the last (east) lit, the first (west) shaded
    assert lit_pm.tolist() == [[False, True]], lit_pm
    # sun below the horizon or unknown: no sun-aware vote at all
    assert sunlit_ends(mods, lines, (morning[0], morning[1], -5.0), cos) is None
    assert sunlit_ends(mods, lines, None, cos) is None


def test_right_placement_of_the_tracker_rows_is_used_on_the_glass_ends(plant):
    """The whole registration: a placement that passes the registration check is on its own
    modules; one used on the glass ends is right. In the default run (the flight that was
    refused) it is placed, right, used on the glass ends, and passes."""
    assert_pitch_rule_right(plant, "glass_ends", FLIGHT_SEED == 1020000)


def test_placement_one_pitch_off_is_not_used_on_the_glass_ends(plant):
    """The same plant placed one module pitch off along its rows, either way (the truth's own
    placement moved by the pitch, each table's residual kept): the glass ends do not decide for it
    and it is not called ok; at the truth they read glass in the end modules and none beyond."""
    with plant_at_truth(plant) as p:
        cfg, truth = p.cfg, p.truth
        dirs, steps = pitch_steps(p.mods)
        reg = resolve_pitch_at(p, truth, "placed at the truth")
        glass = reg.evidence["pitch"]["ends"]["glass"]
        assert glass["along"]["vote"] >= cfg["ends_glass_vote"], glass
        for d, v in zip(dirs, steps):
            if d != "along":
                continue
            off = replace(truth, tx=truth.tx + float(v[0]), ty=truth.ty + float(v[1]))
            assert median_error_m(plant, apply_placement(p.mods, off)) > RIGHT_M  # it is one pitch off
            reg = resolve_pitch_at(p, off, "placed one pitch off", switch=False)
            pitch = reg.evidence["pitch"]
            assert not pitch["glass_ends"], (v, pitch)
            assert reg.status != "ok", (v, reg.message, pitch)
            assert np.isfinite(pitch["ends"]["glass"]["along"]["vote"]), pitch
            assert pitch["ends"]["glass"]["along"]["vote"] < cfg["ends_glass_vote"], (v, pitch)
