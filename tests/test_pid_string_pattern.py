"""The PID pattern no finding takes in, combined over the first modules of a string.

PID takes most from the modules nearest a string's negative end and fades along the string
(IEC TS 62446-3: the thermal pattern of PID, modules at one end of a string with warmer cells,
mostly next to the frame; common practice: the gradient along the string). A faint PID string
shows over several modules before any one of them carries the pattern by itself; the
validity check ``unexplained_pid_pattern`` combines their evidence (Stouffer's method).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import combine_pvalues, norm
from test_classify import Plant, faiman_rise

import pvscan.diagnose.classify as classify_module
from pvscan.diagnose.patterns.pid import unexplained_string_pattern
from pvscan.io.settings import load_pipeline
from pvscan.measure.validity import evidence_checks


def _stouffer(z):
    """Combined z of independent z scores by Stouffer's method, as scipy computes it."""
    p = combine_pvalues(norm.sf(np.asarray(z, dtype=float)), method="stouffer").pvalue
    return float(norm.isf(p))


def test_combined_evidence_is_stouffers_over_the_best_prefix(rng):
    # strings of 4-12 modules in random order along pos, some modules in findings: the value is
    # the best prefix from the negative end (within the first half, modules in no finding) of
    # Stouffer's combined z of the lesser of the two references (scipy.stats.combine_pvalues)
    n_str = 6
    lens = rng.integers(4, 13, n_str)
    groups = np.repeat(np.arange(n_str), lens)
    n = len(groups)
    pos = rng.permutation(n).astype(float)
    z, z_row = rng.normal(0.0, 2.0, n), rng.normal(0.0, 2.0, n)
    free = rng.random(n) > 0.15
    want = (0.0, None, 0)
    for g in range(n_str):
        idx = np.flatnonzero(groups == g)
        idx = idx[np.argsort(pos[idx])]
        sub = idx[:max(len(idx) // 2, 1)]
        if not free[sub[0]]:
            continue
        stop = next((k for k, i in enumerate(sub) if not free[i]), len(sub))
        for m in range(1, stop + 1):
            v = _stouffer(np.minimum(z, z_row)[sub[:m]])
            if want[1] is None or v > want[0]:
                want = (v, int(sub[0]), m)
    got = unexplained_string_pattern(z, z_row, groups, pos, free, 0.5)
    assert got[1] == want[1] and got[2] == want[2], (got, want)
    assert got[0] == pytest.approx(max(want[0], 0.0), abs=1e-9)
    # one module's value alone, the combined z of one score: the score itself
    one = unexplained_string_pattern(z, z_row, groups, pos, free, 0.0)
    assert one[2] in (0, 1)


def _pattern(diag):
    checks = {c["name"]: c for c in evidence_checks(diag.evidence, load_pipeline())}
    return checks["unexplained_pid_pattern"]


def test_faint_pid_string_read_cool_is_flagged_over_its_first_modules(rng, monkeypatch):
    # a faint PID string (12 % of the first module's output, fading to a third along the string
    # of six: IEC TS 62446-3 pattern, common-practice gradient) under a cloud shadow that cools
    # it by a 10 % irradiance dip on the Faiman rise (pvlib.temperature.faiman): no PID finding
    # (PID warms its modules), and no module carries the pattern past the bar by itself on about
    # half the plants; the first modules' combined evidence (Stouffer) flags nearly all of them.
    # Measured on 24 plants (seeds 0-23): combined 23 flagged, the first module alone 13. The
    # combined value over 12 plants is 1.06-1.45 times the first module's alone (test seeds 0-20;
    # fading f0 (1/3)^(k/5): the first three modules' 1 + 0.80 + 0.64 over sqrt(3) = 1.41, less
    # the noise). Flagged 10-12 of 12 for seeds 0-20: binomial at 0.9, P(at most 7 of
    # 12) ~ 0.4 %. The first module alone gives a ratio of exactly 1.
    first_only = classify_module.unexplained_string_pattern
    n_plants, combined, v_comb, v_alone, healthy = 12, 0, 0.0, 0.0, 0
    for _ in range(n_plants):
        p = Plant(rng, strings="half")
        idx = [int(i) for i in p.pid("T1-0-R2-S1", 6, f0=0.12)]
        for i in idx:
            p.cm[i] -= 0.10 * faiman_rise()
        monkeypatch.setattr(classify_module, "unexplained_string_pattern", first_only)
        diag = p.run()
        taken = {int(i) for ids in diag.anomalies.module_indices for i in ids}
        assert taken.isdisjoint(idx), diag.anomalies
        c = _pattern(diag)
        v_comb += c["value"]
        if c["passed"] is False:
            combined += 1
            assert c["module"] == p.modules.module_id[idx[0]], c
        # the module at the negative end by itself (prefixes of one module)
        monkeypatch.setattr(classify_module, "unexplained_string_pattern",
                            lambda z, zr, g, pos, free, mp: first_only(z, zr, g, pos, free, 0.0))
        v_alone += _pattern(p.run())["value"]
        monkeypatch.setattr(classify_module, "unexplained_string_pattern", first_only)
        healthy += _pattern(Plant(rng, strings="half").run())["passed"] is False
    assert combined >= 8, combined
    assert v_comb >= 1.02 * v_alone, (v_comb, v_alone)
    # healthy plants pass (24 of 24 measured; at most one of 12 allowed)
    assert healthy <= 1, healthy
