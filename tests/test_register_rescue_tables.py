"""A placement put on glass only table by table, with tables the refinement could not reach.

``pvscan simulate --random 1910000 --family turned_layout``: tracker rows whose ortho was built
on a surface that displaces the raised tables: the site is stretched about 0.4 m east-west
(the tables of one end 0.2 m east of where the best similarity puts them, those of the other
end 0.2 m west), which no shift, turn and scale follows. The global fit's footprints fail the
glass test; refined table by table (``fit._rescue_locally``) the tables of one end move onto
their modules, those of the other do not (their correction lies at the edge of the local
search), and the site's mean passed the glass test with a third of the sample off glass: the
flight was reported valid with recall 0.33 and a placement 0.24 m off (95th percentile). Each
table is now judged on its own modules as well (``fit._tables_off_glass``).

Other PVSCAN_TEST_SEED values fly the same plant (the same stretch) with other noise, defects
and distractors; the checks hold for every one. Where the modules are is the simulator's truth
(truth_ortho.geojson: the modules where the ortho shows them), which no registration code reads.
"""
from __future__ import annotations

import numpy as np
import pytest
from register_flights import FEWER_DEFECTS_OK, flight_seed, module_errors_m, register_whole, simulate_plant

from pvscan.measure.register import apply_placement

pytestmark = FEWER_DEFECTS_OK
FLIGHT_SEED = flight_seed(1910000)
#: Largest 95th-percentile module error of a placement fit to measure on [m]: half the shorter
#: side of a cell (full cells are about 0.16 m), where a footprint's edge band takes in the
#: neighbouring cell or the ground (common practice; benchmarks/campaign.py PLACEMENT_OFF_M).
PLACEMENT_OFF_M = 0.1


@pytest.fixture(scope="module")
def plant(tmp_path_factory):
    return simulate_plant(tmp_path_factory, 1910000, "turned_layout")


def _p95(plant, mods, reg) -> float:
    return float(np.percentile(module_errors_m(plant, apply_placement(mods, reg.placement if reg.applied else None)),
                               95))


def test_stretched_site_is_placed_right_or_refused(plant):
    """Placed with 95 % of the modules within :data:`PLACEMENT_OFF_M` of the truth, or the
    registration check fails. In the default run refused, naming the tables still off glass;
    and with every share allowed (``rescue_max_off_glass_share = 1``) the same rescue is used
    with its placement off by more than :data:`PLACEMENT_OFF_M`: the failure the table test
    catches."""
    _, mods, reg, _, check = register_whole(plant)
    p95 = _p95(plant, mods, reg)
    assert p95 < PLACEMENT_OFF_M or check["passed"] is False, (p95, reg.message)
    if FLIGHT_SEED == 1910000:
        rescue = (reg.evidence or {}).get("local_rescue") or {}
        assert reg.status == "failed" and check["passed"] is False, reg.message
        assert rescue.get("ok") is True  # the site's mean alone passes
        assert rescue.get("off_glass_share", 0.0) > 0.1 and len(rescue.get("tables_off_glass", [])) >= 1, rescue
        assert "still off glass" in reg.message and rescue["tables_off_glass"][0] in reg.message
        _, mods, reg, _, check = register_whole(plant, register={"rescue_max_off_glass_share": 1.0})
        assert reg.status == "ok" and check["passed"] is True, reg.message
        assert _p95(plant, mods, reg) > PLACEMENT_OFF_M
