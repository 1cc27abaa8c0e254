"""The end-of-run summary of ``pvscan inspect``: where the results are, wrapped cleanly.

The summary is held to about 100 columns (common practice for terminal output: 80 to 100
columns; the project's own bound is ``_WIDTH``). A path or a file name is what a reader copies
into a shell or a file browser, so it is never cut, shortened with "..." or hyphenated; lists of
files break between names only (own rule of the project, after how POSIX ``ls`` and
``textwrap`` without ``break_long_words`` lay out names).
"""
from __future__ import annotations

import re
import string
from pathlib import Path

import numpy as np
import pytest
from conftest import test_seed
from test_report import build_result

from pvscan.cli._summary import _WIDTH, _wrap, summary_lines

#: File names the inspect command writes, in the order the summary names them.
WRITTEN = ["report.html", "summary.json", "workorders.csv", "workorders.gpx",
           "anomalies.geojson", "modules.geojson", "pvscan.gpkg"]


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    return build_result(tmp_path_factory.mktemp("summary"), seed=test_seed(11))


def _names_on(lines: list[str]) -> list[str]:
    """File-name-like tokens of the lines (letters, digits, ``._-``, with a dot), in order."""
    return [t for s in lines for t in re.findall(r"[\w.\-]+\.\w+", s)]


def _files_block(lines: list[str]) -> list[str]:
    """The lines from "results in" up to the safety notes."""
    start = next(i for i, s in enumerate(lines) if s.startswith("results in"))
    end = next(i for i, s in enumerate(lines) if s.startswith("safety:"))
    return lines[start:end]


def test_short_result_names_every_file_once_and_in_order(result):
    for n in WRITTEN:
        (result / n).touch(exist_ok=True)
    lines = summary_lines(result)
    block = _files_block(lines)
    assert block[0] == f"results in {result}/" or block[1].strip() == f"{result}/"
    names = _names_on(block[1:])
    assert names == WRITTEN, names
    assert all(len(s) <= _WIDTH for s in block if str(result) not in s)
    assert not any("..." in s for s in block)


def test_long_file_lists_wrap_between_names_and_keep_paths_whole(result, tmp_path):
    """Many extra files with long names, in a folder with a path longer than a line: every
    name is on the list whole and once, no line but the path's own is over the width."""
    import shutil

    rng = np.random.default_rng(test_seed(12))
    deep = tmp_path.joinpath(*["a-rather-long-folder-name-for-results"] * 4) / "run"
    shutil.copytree(result, deep)
    letters = np.array(list(string.ascii_lowercase + "_-"))
    extra = sorted({"".join(rng.choice(letters, int(rng.integers(8, 60)))).strip("-_") + ".tif"
                    for _ in range(int(rng.integers(12, 25)))})
    extra = [e for e in extra if len(e) > 4]
    for e in extra:
        (deep / e).write_bytes(b"")
    (deep / ".staging-lock").write_bytes(b"")  # hidden files are not results

    lines = summary_lines(deep)
    block = _files_block(lines)
    path = f"{deep}/"
    assert len(path) > _WIDTH
    # the path stands whole on a line of its own, indented
    assert block[0] == "results in" and block[1] == "  " + path
    listed = _names_on(block[2:])
    present = sorted(p.name for p in deep.iterdir() if not p.name.startswith("."))
    assert sorted(listed) == present, set(listed) ^ set(present)
    assert ".staging-lock" not in "\n".join(block)
    # the known files keep their order and groups; the others follow, sorted
    assert listed[: len(WRITTEN)] == WRITTEN
    assert listed[len(WRITTEN):] == sorted(extra)
    assert any(s.startswith("  also: ") for s in block)
    for s in block[2:]:
        assert len(s) <= _WIDTH, s
        assert s.startswith("  ") and not s.endswith((";", " ")), s
        assert "..." not in s
    # each group starts a line of its own
    for head in ("  report.html", "  field: workorders.csv", "  GIS: anomalies.geojson", "  also: "):
        assert any(s.startswith(head) for s in block), head
    # nothing else in the summary is over the width either
    assert max(len(s) for s in lines if s != "  " + path) <= _WIDTH


def test_wrap_breaks_only_at_spaces():
    rng = np.random.default_rng(test_seed(13))
    words = ["".join(rng.choice(list(string.ascii_lowercase + ".-"), int(rng.integers(1, 40))))
             for _ in range(60)]
    long = "x" * (_WIDTH + 15) + ".gpkg"  # a name longer than a line
    words.insert(int(rng.integers(0, len(words))), long)
    out = _wrap(" ".join(words), indent="    ", first="  ")
    assert [w for s in out for w in s.split()] == words  # every word whole, in order
    assert "  " + long in out or "    " + long in out  # the long name alone on its line
    assert all(len(s) <= _WIDTH for s in out if long not in s)
    assert out[0].startswith("  ") and all(s.startswith("    ") for s in out[1:])


def test_summary_of_a_result_without_files_says_where_it_is(tmp_path, result):
    """Only summary.json and the tables the summary reads: the list names what is there."""
    import shutil

    dst = tmp_path / "bare"
    shutil.copytree(result, dst)
    for n in ("report.html", "workorders.gpx", "pvscan.gpkg"):
        (dst / n).unlink(missing_ok=True)
    block = _files_block(summary_lines(dst))
    names = _names_on(block[1:])
    assert "report.html" not in names and "pvscan.gpkg" not in names
    assert "summary.json" in names and "anomalies.geojson" in names
    assert Path(block[0].removeprefix("results in ").strip() or block[1].strip()).resolve() == dst.resolve()


def test_a_clean_bill_of_health_names_every_check_it_passed(result, tmp_path):
    """"All checks passed" lists each check of ``summary.json`` ``validity.checks`` by name.

    A reader takes the line as the list of what was checked (common practice: a verdict says
    what it covers); a check added to the pipeline must not pass unnamed. The result's
    validity is set to passed here, each check passed, so the line is printed.
    """
    import json
    import shutil

    dst = tmp_path / "ok"
    shutil.copytree(result, dst)
    path = dst / "summary.json"
    summary = json.loads(path.read_text())
    checks = summary["validity"]["checks"]
    assert len(checks) >= 3
    for c in checks:
        c["passed"] = True
    summary["validity"]["ok"] = True
    summary["validity"]["failed"] = []
    path.write_text(json.dumps(summary))
    text = " ".join(line.strip() for line in summary_lines(dst))
    assert f"all {len(checks)} checks passed" in text
    for c in checks:
        assert str(c["name"]).replace("_", " ") in text, c["name"]
