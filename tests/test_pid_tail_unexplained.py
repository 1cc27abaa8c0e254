"""Validity check ``unexplained_pid_tail``: a PID string found only in part.

PID takes most from the module at a string's negative end and fades along the string (common
practice: to about a third at its last affected module), in a patchy pattern of warmer cells,
mostly next to the frame (IEC TS 62446-3, the thermal pattern of PID). Its last modules lose
little enough to sit near the noise one by one, so a run can stop short; the modules it leaves
behind still carry the pattern together.
"""
from __future__ import annotations

import numpy as np
from test_classify import Plant, _with_validity, found

from pvscan.diagnose.patterns.pid import unexplained_tail_evidence
from pvscan.io.settings import load_pipeline
from pvscan.measure.validity import evidence_checks


def _run_check(diag, settings=None):
    checks = {c["name"]: c for c in evidence_checks(diag.evidence, settings or load_pipeline())}
    return checks["unexplained_pid_tail"]


def test_evidence_is_stouffers_over_the_modules_past_a_run():
    # one string of eight (negative end first), a run found over its first three: the evidence
    # past it is sum(z) / sqrt(m) over the best m free modules from the fourth on (Stouffer's
    # method, the sum of m standard normal scores over sqrt(m)): m = 1, 2, 3 give 3, 5 / sqrt(2)
    # = 3.54, 6 / sqrt(3) = 3.46, so m = 2
    z = np.array([6.0, 5.0, 4.0, 3.0, 2.0, 1.0, -2.0, -1.0])
    groups = np.zeros(8, int)
    pos = np.arange(8.0)
    free = np.ones(8, bool)
    free[:3] = False
    v, at, m = unexplained_tail_evidence(z, groups, pos, True, free, [[0, 1, 2]])
    assert (at, m) == (3, 2)
    assert abs(v - 5.0 / np.sqrt(2.0)) < 1e-12
    # the run found facing the other way along a table row (no strings): the modules before its
    # first one count too
    v2, at2, m2 = unexplained_tail_evidence(z[::-1].copy(), groups, pos, False, free[::-1].copy(), [[5, 6, 7]])
    assert (at2, m2) == (4, 2) and abs(v2 - v) < 1e-12
    # with strings known the run's direction is the string's: nothing before its negative end
    assert unexplained_tail_evidence(z[::-1].copy(), groups, pos, True, free[::-1].copy(), [[5, 6, 7]])[1] is None
    # nothing free past the run: 0, no module
    assert unexplained_tail_evidence(z, groups, pos, True, np.zeros(8, bool), [[0, 1, 2]])[:2] == (0.0, None)


def test_pid_run_found_in_part_is_flagged_not_called_valid(rng):
    # PID over a whole string of six from its negative end (a quarter of the first module's output,
    # fading to a third of it at the sixth): the run is found over its first three or four modules,
    # and the modules past it, which by themselves stay below the bars that carry a run past the
    # first half of a string, are left out. The flight is then flagged, not called valid; healthy
    # plants pass. Measured on 30 plants: the run found in part on 28, flagged on 22 of them
    # (evidence past it 1.7-8.6, mean 6.0); healthy plants 0 of 30 flagged (no PID run found:
    # evidence 0; bar 4). With 8 plants the chance (scipy.stats.binom) that fewer than 5 runs are found in part
    # is 0.3 % (p 0.93), that at most one of 5 or more is flagged 0.4 % (p 0.79), that more than
    # two healthy plants are flagged 0.1 % (p 0.03, above the 0 of 30 measured).
    n_plants, partial, flagged, healthy_flagged = 8, 0, 0, 0
    v_partial, v_healthy = [], []
    for _ in range(n_plants):
        p = Plant(rng, strings="half")
        idx = [int(i) for i in p.pid("T1-0-R2-S1", 6, f0=0.25)]
        diag = p.run()
        got = found(diag.anomalies)
        n_found = sum(got.get(i) == "pid" for i in idx)
        c = _run_check(diag)
        if 0 < n_found < len(idx):
            partial += 1
            flagged += c["passed"] is False
            v_partial.append(c["value"])
        if c["passed"] is False:
            assert c["module"] in set(p.modules.module_id[idx]), c
            assert _run_check(diag, _with_validity(max_unexplained_pid_tail_z=100.0))["passed"] is True
        h = _run_check(Plant(rng, strings="half").run())
        healthy_flagged += h["passed"] is False
        v_healthy.append(h["value"])
    assert partial >= 5 and flagged >= 2, (partial, flagged)
    # the evidence past a run found in part stands well above a healthy plant's on average
    assert np.mean(v_partial) >= np.mean(v_healthy) + 1.5, (v_partial, v_healthy)
    assert healthy_flagged <= 2, healthy_flagged
