"""Validity checks of what the classification measured about the flight as a whole.

``string_reference``: the spread of healthy modules against modules outside their own string,
in module-to-module spreads, read from :attr:`pvscan.diagnose.results.Diagnosis.evidence` by
:func:`pvscan.measure.validity.evidence_checks`. Small synthetic plants at cell level
(``Plant`` of tests/test_classify.py, temperatures from pvlib's Faiman model); the seed comes
from PVSCAN_TEST_SEED.
"""
from __future__ import annotations

import numpy as np
import pytest
from test_classify import Plant, open_rise

from pvscan.io.settings import load_pipeline
from pvscan.measure.validity import Validity, evidence_checks, string_reference_check, with_checks


def _check(diagnosis):
    checks = {c["name"]: c for c in evidence_checks(diagnosis.evidence)}
    return checks["string_reference"]


def _plant(seed, levels_rise=0.0):
    """A plant of 3 x 2 tables (12 strings, a table row each); with ``levels_rise`` each string
    runs at its own level, spread evenly over +-levels_rise x eta * G / U, in random order."""
    rng = np.random.default_rng(seed)
    p = Plant(rng, n_tables=3)
    if levels_rise:
        sid = p.modules.string_id.to_numpy()
        names = np.unique(sid)
        levels = rng.permutation(np.linspace(-levels_rise, levels_rise, len(names))) * open_rise()
        for name, level in zip(names, levels):
            p.cm[sid == name] += level
    return p


def test_healthy_plants_pass_string_reference(seed):
    # module against module and module against other strings scatter alike on a healthy plant
    # (module spread 0.3 K, common to both): a ratio near 1, below the limit of 2
    for k in range(8):
        c = _check(_plant(seed + k).run())
        assert c["passed"] is True and 0.3 < c["value"] < 2.0, c["message"]
        assert c["module_spread_k"] == pytest.approx(0.3, abs=0.15)
        assert c["limit"] == load_pipeline()["validity"]["max_other_spread_ratio"]


def test_strings_at_different_levels_fail_string_reference(seed):
    # each string runs at its own level, up to 0.6 x eta * G / U (pvlib Faiman, about 2.5 K)
    # above or below the others, against a module spread of 0.3 K: a string raised by an open
    # circuit or PID cannot be told from them (the highest are even taken for open strings),
    # so the flight must say that open strings and PID were not measured. Rate over 8 plants:
    # measured 9 of 10 on seeds 1-10 (one arrangement puts like levels side by side, so each
    # string's out-of-string reference shares its level); at least 6 of 8 asked
    failed = 0
    for k in range(8):
        d = _plant(seed + k, levels_rise=0.6).run()
        c = _check(d)
        v = with_checks(Validity(), evidence_checks(d.evidence), load_pipeline())
        assert (v.ok is False) is (c["passed"] is False)
        if c["passed"] is False:
            failed += 1
            assert "open strings and PID" in c["message"] and v.failed == ["string_reference"]
            assert v.confidence_factor < 1.0
    assert failed >= 6


@pytest.mark.parametrize("other_k, passed", [(0.45, True), (1.5, False), (float("nan"), None)])
def test_string_reference_check_reads_the_out_of_string_spread(other_k, passed):
    c = string_reference_check({"module_spread_k": 0.5, "other_spread_k": other_k, "groups": 3,
                                "strings_known": True})
    assert c["passed"] is passed
    if passed is not None:
        assert c["value"] == pytest.approx(other_k / 0.5)
    if passed is False:
        assert "open strings and PID" in c["message"]


def test_no_evidence_no_check():
    assert evidence_checks({}) == []


# ---- row_cluster ------------------------------------------------------------------------------

def _rows_layout(n_rows=12, per_row=22):
    """A layout of ``n_rows`` table rows of ``per_row`` modules (table_id, table_row, table_col)."""
    import pandas as pd

    r, c = np.divmod(np.arange(n_rows * per_row), per_row)
    return pd.DataFrame({"module_id": [f"T{a // 2:02d}-R{a % 2 + 1}-C{b + 1:02d}" for a, b in zip(r, c)],
                         "table_id": [f"T{a // 2:02d}" for a in r], "table_row": r % 2 + 1, "table_col": c + 1})


def _clusters(modules, defect):
    from pvscan.diagnose.row_evidence import row_clusters as _row_clusters

    cfg = load_pipeline()["classify"]
    return _row_clusters(modules, np.asarray(defect, dtype=object), np.ones(len(modules), bool), cfg)


def test_independent_findings_rarely_fail_row_cluster(seed):
    # faults of single modules strike independently: the chance that the densest stretch of
    # any row is as unlikely as the limit says is at most 1 % (Bonferroni bound over every
    # stretch; binomial tails from scipy.stats). Over 100 plants of 264 modules with findings
    # at a random rate of 1-25 %, at most 4 fail (binomial n = 100, p = 0.01: P(X >= 5) = 0.34 %)
    rng = np.random.default_rng(seed)
    m = _rows_layout()
    lim = load_pipeline()["validity"]["max_row_cluster_score"]
    failed = 0
    for _ in range(100):
        rate = rng.uniform(0.01, 0.25)
        hit = rng.random(len(m)) < rate
        defect = np.where(hit, rng.choice(["hot_cell", "junction_box", "bypassed_substring"], len(m)), None)
        ev = _clusters(m, defect)
        failed += ev["row_cluster_score"] > lim
    assert failed <= 4


def test_findings_crowding_a_stretch_of_a_row_fail_row_cluster(seed):
    # a mosaic seam running through the modules of a row makes cell findings in most modules
    # of a stretch (9 of 13) besides a few scattered true ones: the binomial chance of so dense
    # a stretch at the flight's rate (12 %), times the stretches tested, is about 1 in 1,000
    # (scipy.stats.binom); the same number of findings scattered over the plant passes
    rng = np.random.default_rng(seed)
    m = _rows_layout()
    n = len(m)
    crowd = np.arange(3 * 22 + 5, 3 * 22 + 18)[np.sort(rng.choice(13, 9, replace=False))]
    rest = rng.choice(np.setdiff1d(np.arange(n), np.arange(3 * 22, 4 * 22)), 22, replace=False)
    defect = np.full(n, None, dtype=object)
    defect[crowd] = "several_hot_cells"
    defect[rest] = "hot_cell"
    ev = _clusters(m, defect)
    c = {x["name"]: x for x in evidence_checks({"module_spread_k": 0.5, "other_spread_k": 0.5, **ev})}["row_cluster"]
    # the densest stretch is in the crowded row (its least chance may be a part of the 13
    # modules, such as 8 of 10) and holds most of the crowd
    assert c["passed"] is False
    row = set(m.module_id.to_numpy()[3 * 22:4 * 22])
    assert set(c["modules"]) <= row and ev["row_cluster_findings"] >= 7
    assert "image artefact" in c["message"]
    scattered = np.full(n, None, dtype=object)
    scattered[rng.choice(n, len(crowd) + len(rest), replace=False)] = "hot_cell"
    ev2 = _clusters(m, scattered)
    assert ev2["row_cluster_score"] <= load_pipeline()["validity"]["max_row_cluster_score"]
    # string-level patterns run along rows by nature and are not counted
    strings = np.full(n, None, dtype=object)
    strings[np.arange(3 * 22, 3 * 22 + 13)] = "open_string"
    strings[rest] = "hot_cell"
    assert _clusters(m, strings)["row_cluster_score"] <= 1.0


@pytest.mark.parametrize("score, passed", [(0.4, True), (3.3, False), (float("nan"), None)])
def test_row_cluster_check_reads_the_score(score, passed):
    from pvscan.measure.validity import row_cluster_check

    c = row_cluster_check({"row_cluster_score": score, "row_cluster_modules": ["a", "b", "c"],
                           "row_cluster_findings": 3, "row_cluster_rate": 0.05})
    assert c["passed"] is passed
    v = with_checks(Validity(), [c])
    assert (v.ok is False) is (passed is False)
    if passed is False:
        assert v.failed == ["row_cluster"] and v.confidence_factor < 1.0


# ---- unexplained_pid ----------------------------------------------------------------------------

def _pid_check(d):
    return {c["name"]: c for c in evidence_checks(d.evidence)}["unexplained_pid"]


def test_pid_string_found_or_healthy_passes_unexplained_pid(seed):
    # a healthy plant has no warm module with a strong edge ring; a PID string that is found
    # takes its first module in (PID shunts the cells of the modules at the negative end most,
    # edge cells first: common practice; modules warmer by the power lost, Faiman heat balance)
    for k in range(4):
        c = _pid_check(_plant(seed + k).run())
        assert c["passed"] is True, c["message"]
        p = _plant(seed + 100 + k)
        p.pid("T1-1-R2", 4, f0=0.5)
        d = p.run()
        assert "pid" in set(d.anomalies.defect)
        assert _pid_check(d)["passed"] is True


def test_pid_seed_left_unexplained_fails_unexplained_pid(seed):
    # the module at the string's negative end shows PID strongly and runs warm, the modules
    # after it show no edge pattern (as under a cloud shadow or a patchy start): no PID string
    # is found, and the flight must say a string-level fault may be missed. Weak PID (first
    # module losing 30 %), so that its edge cells mostly stay below the hot-cell floor (3 K,
    # common practice). Rates measured on 200 plants (seeds 1000-1199): no PID found on 200,
    # the check failed on 186 (93 %; on 13 of the others a hot-cell finding covers the first
    # module, which is then explained). Over 12 plants: PID found on at most 1 (binomial at
    # 0.5 %: P(X >= 2) = 0.16 %), the check failed on at least 8 (at 93 %: P(X <= 7) = 0.09 %)
    failed = pid_found = 0
    for k in range(12):
        p = _plant(seed + 200 + k)
        idx = p.pid("T1-1-R2", 3, f0=0.3)
        for i in idx[1:]:
            p.cm[i] = np.median(p.cm[i])
        d = p.run()
        pid_found += "pid" in set(d.anomalies.defect)
        c = _pid_check(d)
        failed += c["passed"] is False
        if c["passed"] is False:
            assert c["module"] == p.modules.module_id.to_numpy()[idx[0]] and "string-level" in c["message"]
            v = with_checks(Validity(), evidence_checks(d.evidence), load_pipeline())
            assert v.ok is False and "unexplained_pid" in v.failed
    assert pid_found <= 1
    assert failed >= 8


@pytest.mark.parametrize("z, passed", [(3.5, True), (7.4, False), (None, None)])
def test_unexplained_pid_check_reads_the_contrast(z, passed):
    from pvscan.measure.validity import unexplained_pid_check

    c = unexplained_pid_check({"pid_unexplained_z": z, "pid_unexplained_module": "M1"})
    assert c["passed"] is passed
