"""A large site's table ends vote with an evenly spread subset of its lines of modules
(``[register] ends_max_lines``; pvscan.measure.register.ends).

The vote is a median over lines; a systematic sample spread over the whole site estimates a
median with a standard error of about 1.25 sigma / sqrt(n) (the standard error of a sample
median, common practice). The decision on the simulated plant of tests/test_register_ends.py
(the simulator's truth, truth_ortho.geojson, read by no registration code) must not depend on
voting with every line or with a few.
"""
from __future__ import annotations

import pytest
from register_flights import simulate_plant, truth_placement

from pvscan.io.layout import read_layout
from pvscan.io.manifest import load_flight
from pvscan.io.ortho import open_orthos
from pvscan.io.settings import load_pipeline
from pvscan.measure.register import apply_placement
from pvscan.measure.register._blocks import _settings
from pvscan.measure.register._pitch import _pitches
from pvscan.measure.register.ends import _spread_subset, end_lines, judge_ends


@pytest.mark.parametrize("n, most", [(10, 20), (10, 10), (1000, 7), (12768, 1000), (5, 0)])
def test_subset_is_evenly_spread_and_bounded(n, most, seed):
    lines = [(i, i + seed % 5 + 1, 2) for i in range(n)]
    sub = _spread_subset(lines, most)
    if most <= 0 or n <= most:
        assert sub == lines
        return
    assert len(sub) == most
    assert sub[0] == lines[0] and sub[-1] == lines[-1]
    idx = [lines.index(x) for x in sub]
    gaps = [b - a for a, b in zip(idx, idx[1:])]
    # evenly spaced: every gap is the mean gap rounded one way or the other
    mean = (n - 1) / (most - 1)
    assert all(int(mean) <= g <= int(mean) + 1 for g in gaps), gaps


@pytest.fixture(scope="module")
def plant(tmp_path_factory):
    return simulate_plant(tmp_path_factory, 800000, "any")


def test_a_few_lines_vote_as_all_of_them(plant):
    """At the truth and one module pitch along the rows either way, voting with 6 lines a
    direction decides as voting with all of them (the truth above ends_min_vote, the pitch
    off below the truth's vote)."""
    pipe = load_pipeline()
    cfg_all = {**_settings(pipe), "ends_max_lines": 0}
    cfg_few = {**_settings(pipe), "ends_max_lines": 6}
    fl = load_flight(plant / "flight.toml")
    with open_orthos(fl.flight.orthos, fl.ortho) as o:
        mods = read_layout(fl, o.crs)
        n_lines = {k: len(v) for k, v in end_lines(mods).items()}
        true = truth_placement(plant, mods)
        along = _pitches(mods)[0]
        places = [true] + [true.moved(tx=true.tx + s * along[0], ty=true.ty + s * along[1]) for s in (1.0, -1.0)]
        votes = [(judge_ends(o, mods, apply_placement(mods, p), cfg_all),
                  judge_ends(o, mods, apply_placement(mods, p), cfg_few)) for p in places]
    assert max(n_lines.values()) > 6, n_lines  # the subset is a subset
    for every, few in votes:
        for name in ("along", "across"):
            if name in every:
                assert few[name]["lines"] <= min(6, every[name]["lines"])
    (t_all, t_few), offs = votes[0], votes[1:]
    assert t_all["decisive"] == t_few["decisive"]
    for every, few in offs:
        assert every["lowest"] < t_all["lowest"] and few["lowest"] < t_few["lowest"], (every, few)
