"""The simulator shares no code with what it measures.

Every module of ``pvscan/simulate`` is parsed with :mod:`ast`; an import (``import``,
``from ... import``, or a relative import) of the pipeline's physics, measuring or diagnosing
code, or of its robust statistics, fails the test. Own rule of the project: a yardstick that
moves with the thing it measures measures nothing.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

import pvscan.simulate

FORBIDDEN = ("pvscan.physics", "pvscan.measure", "pvscan.diagnose", "pvscan.robust",
             "pvscan.pipeline", "pvscan.evaluate")
SIM_DIR = Path(pvscan.simulate.__file__).parent


def _imports_of_source(src: str, package: str) -> list[str]:
    """Every module (and module.name) a source imports, relative imports resolved."""
    names = []
    for node in ast.walk(ast.parse(src)):
        if isinstance(node, ast.Import):
            names += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            names.append(mod)
            names += [f"{mod}.{a.name}" for a in node.names]
    return names


def _imports(path: Path) -> list[str]:
    package = ".".join(("pvscan", "simulate", *path.relative_to(SIM_DIR).parts[:-1]))
    return _imports_of_source(path.read_text(encoding="utf-8"), package)


def _forbidden(names: list[str]) -> list[str]:
    return [n for n in names if any(n == f or n.startswith(f + ".") for f in FORBIDDEN)]


MODULES = sorted(SIM_DIR.rglob("*.py"))


def test_simulator_modules_found():
    assert len(MODULES) >= 8


@pytest.mark.parametrize("path", MODULES, ids=lambda p: p.name)
def test_simulator_module_imports_no_pipeline_code(path):
    bad = _forbidden(_imports(path))
    assert not bad, f"{path.name} imports {bad}"


def test_the_check_can_fail():
    # the same parser flags every spelling of a forbidden import, and passes allowed ones
    for src in ("from pvscan.physics import radiometry", "import pvscan.measure.zonal",
                "from pvscan import robust", "from ..physics.planck import band_radiance",
                "from .. import diagnose"):
        assert _forbidden(_imports_of_source(src, "pvscan.simulate")), src
    for src in ("from pvscan.errors import SimulationError", "import pvlib", "from . import scene"):
        assert not _forbidden(_imports_of_source(src, "pvscan.simulate")), src


_LOADED = """
import importlib, json, pkgutil, sys
import pvscan.simulate as sim
for m in pkgutil.iter_modules(sim.__path__):
    importlib.import_module("pvscan.simulate." + m.name)
print(json.dumps(sorted(sys.modules)))
"""


def test_no_pipeline_module_is_loaded_with_the_simulator():
    # the same rule through every indirect path (a helper of pvscan.io that imported physics
    # would pass the parse above): a fresh interpreter imports every simulator module and lists
    # what got loaded
    import json
    import subprocess
    import sys

    out = subprocess.run([sys.executable, "-c", _LOADED], capture_output=True, text=True, check=True).stdout
    loaded = json.loads(out.strip().splitlines()[-1])
    assert any(m.startswith("pvscan.simulate.") for m in loaded)
    assert not _forbidden(loaded), _forbidden(loaded)
    # and the check sees a forbidden module when one is loaded
    assert _forbidden(["pvscan.physics.radiometry", "pvscan.pipelines", "pvscan.io.resources"]) == [
        "pvscan.physics.radiometry"]
