"""Ranking: safety first, then yearly energy loss, then confidence; plain-words actions.

The ordering rule and the live-DC caution are common practice (safety-relevant thermal
abnormalities are a class of their own in IEC TS 62446-3, from memory; PV modules are live
whenever lit, so DC work is for qualified persons under local electrical codes).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import test_seed

from pvscan.diagnose.rank import ACTIONS, LIVE_DC_NOTE, assign_anomaly_ids, rank, recommended_action
from pvscan.io.settings import load_pipeline

DEFECTS = list(ACTIONS)


def _random_anomalies(n: int, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    return pd.DataFrame({
        "module_id": [f"T{rng.integers(1, 9)}-R{rng.integers(1, 3)}-C{rng.integers(1, 25)}" for _ in range(n)],
        "defect": rng.choice(DEFECTS, n),
        "severity": rng.choice(["safety", "repair", "monitor"], n, p=[0.2, 0.5, 0.3]),
        "energy_loss_kwh_per_year": np.round(rng.uniform(0, 500, n), 1),
        "power_loss_w": rng.uniform(0, 400, n),
        "confidence": np.round(rng.uniform(0, 1, n), 2),
    })


@pytest.mark.parametrize("offset", [1, 2, 3])
def test_safety_items_come_first_then_energy(offset):
    an = _random_anomalies(60, test_seed(offset))
    out = rank(an, load_pipeline())
    assert out["priority"].tolist() == list(range(1, 61))
    sev = out["severity"].tolist()
    n_safety = sev.count("safety")
    assert n_safety > 0
    assert all(s == "safety" for s in sev[:n_safety])  # every safety item before any other
    assert "safety" not in sev[n_safety:]
    first = list(load_pipeline()["rank"]["first_severities"])
    tier = np.array([first.index(s) if s in first else len(first) for s in sev])
    assert np.all(np.diff(tier) >= 0)  # the tiers of [rank] first_severities in order, the rest after
    for t in np.unique(tier):
        e = out["energy_loss_kwh_per_year"].to_numpy()[tier == t]
        assert np.all(np.diff(e) <= 0)  # larger yearly loss first within a tier
    # the input is not modified and nothing is lost
    assert sorted(out["module_id"]) == sorted(an["module_id"]) and "priority" not in an.columns


def test_safety_beats_a_larger_loss_and_confidence_breaks_ties():
    an = pd.DataFrame([
        dict(module_id="A", defect="open_string", severity="repair", energy_loss_kwh_per_year=9000.0, confidence=1.0),
        dict(module_id="B", defect="junction_box", severity="safety", energy_loss_kwh_per_year=5.0, confidence=0.5),
        dict(module_id="C", defect="hot_cell", severity="repair", energy_loss_kwh_per_year=30.0, confidence=0.6),
        dict(module_id="D", defect="hot_cell", severity="repair", energy_loss_kwh_per_year=30.0, confidence=0.9),
        dict(module_id="E", defect="soiling", severity="monitor", energy_loss_kwh_per_year=np.nan, confidence=0.9),
    ])
    out = rank(an)
    assert out["module_id"].tolist() == ["B", "A", "D", "C", "E"]  # unknown loss last


def test_first_severities_from_settings():
    an = _random_anomalies(30, test_seed(9))
    p = load_pipeline().replace(rank={"first_severities": ["safety", "repair"]})
    out = rank(an, p)
    tiers = out["severity"].map({"safety": 0, "repair": 1, "monitor": 2}).to_numpy()
    assert np.all(np.diff(tiers) >= 0)


def test_actions_plain_words_and_live_dc_note():
    out = rank(_random_anomalies(40, 4))
    for d, a in zip(out["defect"], out["action"]):
        live = ACTIONS[d][1]
        assert ("qualified persons" in a and "local electrical codes" in a) == live
        if live:
            assert a.endswith(LIVE_DC_NOTE)
    assert "string fuse" in recommended_action("open_string") and "cabling" in recommended_action("open_string")
    jb = recommended_action("junction_box", "safety")
    assert jb.startswith("Urgent (safety)") and "bypass diode" in jb and "replace the module" in jb
    assert "hot" in jb.lower()
    assert recommended_action("soiling").startswith("Clean the modules")
    assert recommended_action("pid", "monitor").startswith("Monitor:")
    # an unknown class still gets an inspection with the caution
    assert recommended_action("something_new").endswith(LIVE_DC_NOTE)
    # overrides from the pipeline replace the text, never the caution
    p = load_pipeline().replace(rank={"actions": {"hot_cell": "Swap the module."}})
    one = rank(pd.DataFrame([dict(module_id="X", defect="hot_cell", severity="repair",
                                  energy_loss_kwh_per_year=1.0, confidence=1.0)]), p)
    assert one["action"].iloc[0].startswith("Swap the module.") and one["action"].iloc[0].endswith(LIVE_DC_NOTE)


def test_anomaly_ids_stable_and_unique():
    an = pd.DataFrame([dict(module_id="T1-R1-C1", defect="hot_cell"), dict(module_id="T1-R1-C1", defect="hot_cell"),
                       dict(module_id="T1-R1-C2", defect="pid", anomaly_id="keep-me")])
    ids = assign_anomaly_ids(an)["anomaly_id"].tolist()
    assert ids == ["T1-R1-C1:hot_cell", "T1-R1-C1:hot_cell:2", "keep-me"]
    assert assign_anomaly_ids(an)["anomaly_id"].tolist() == ids  # deterministic
    empty = rank(an.iloc[:0])
    assert len(empty) == 0 and {"priority", "action", "anomaly_id"} <= set(empty.columns)
