"""Every reason the seams stage can give a levelled stretch is one summary.json accepts.

``summary.json`` is validated against ``schemas/summary.schema.json`` when it is written, so a
reason the schema does not list stops ``pvscan inspect`` on every flight where the seams stage
levels such a stretch (a right flight refused; it happened with the reason ``cold``). The
reasons are read from the stage's own source (every ``Stretch(..., "<reason>")``), so a new one
fails here until the schema lists it.
"""
from __future__ import annotations

import ast
from pathlib import Path

import numpy as np

from pvscan.io.resources import load_schema, schema_errors
from pvscan.measure.seams import Stretch
from pvscan.pipeline import SeamLevelling

SEAMS = Path(__file__).resolve().parents[1] / "pvscan" / "measure" / "seams.py"


def _reasons() -> set[str]:
    out = set()
    for node in ast.walk(ast.parse(SEAMS.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Call) and getattr(node.func, "id", None) == "Stretch" and len(node.args) >= 3:
            arg = node.args[2]
            if isinstance(arg, ast.Constant) and isinstance(arg.value, str):
                out.add(arg.value)
    return out


def test_every_stretch_reason_validates(seed):
    reasons = _reasons()
    assert reasons >= {"strings", "rows"}, reasons  # the parse finds the stage's stretches
    rng = np.random.default_rng(seed)
    ids = np.array([f"TB01-01-R1-C{k:02d}" for k in range(1, 13)])
    schema = load_schema("summary.schema.json")
    art_schema = schema["properties"]["image_artefacts"]
    for reason in sorted(reasons):
        start = int(rng.integers(0, 8))
        lev = SeamLevelling([Stretch(np.arange(start, start + 3), float(rng.normal(0, 1)), reason)],
                            np.zeros(len(ids)), True)
        doc = lev.to_dict(ids)
        errs = [e.message for e in schema_errors(doc, art_schema)]
        assert not errs, (reason, errs)


def test_an_unknown_reason_is_refused(seed):
    # the check above can fail: the schema does refuse a reason it does not list
    ids = np.array(["A", "B", "C"])
    lev = SeamLevelling([Stretch(np.arange(3), 0.5, f"unknown-{seed}")], np.zeros(3), True)
    art_schema = load_schema("summary.schema.json")["properties"]["image_artefacts"]
    assert schema_errors(lev.to_dict(ids), art_schema)


def test_every_stretch_reason_is_explained_in_the_report():
    from types import SimpleNamespace

    from pvscan.report._sections import artefacts

    for reason in sorted(_reasons()):
        doc = {"image_artefacts": {"levelling": True, "levelled_modules": 2,
                                   "stretches": [{"modules": ["A", "B"], "offset_k": -1.1, "reason": reason}]}}
        item = artefacts(SimpleNamespace(summary=doc))["items"][0]
        assert not item.rstrip().endswith(","), (reason, item)  # a reason without words leaves "..., "
