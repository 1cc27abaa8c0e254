"""Packaging: every package and data file ships, every import is declared.

A non-editable install (``make wheel-check``, run by ``.ci/run``) is the end-to-end check;
these tests catch the usual slips before a wheel is built: a package or data folder that
would not ship, a third-party import not declared as a dependency, a test-only package
imported by the library.
"""
from __future__ import annotations

import ast
import importlib.metadata
import importlib.util
import re
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))


def _dist_name(req: str) -> str:
    """Normalised distribution name of a requirement string (PEP 503)."""
    name = re.match(r"\s*([A-Za-z0-9._-]+)", req).group(1)
    return re.sub(r"[-_.]+", "-", name).lower()


def _top_level_imports(folder: Path) -> dict[str, set[str]]:
    """Top-level module name -> files importing it (absolute imports only)."""
    out: dict[str, set[str]] = {}
    for path in folder.rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            else:
                continue
            for n in names:
                out.setdefault(n.split(".")[0], set()).add(str(path.relative_to(ROOT)))
    return out


def _third_party(imports: dict[str, set[str]]) -> dict[str, set[str]]:
    return {m: f for m, f in imports.items()
            if m not in sys.stdlib_module_names and m not in ("pvscan", "__future__")}


def test_every_package_ships():
    """setup.py ships every folder of pvscan/ with an __init__.py, and the two folders mapped
    into the package ([tool.setuptools.package-dir]) are packages that exist."""
    import runpy
    from unittest import mock

    with mock.patch("setuptools.setup") as setup:
        runpy.run_path(str(ROOT / "setup.py"))
    shipped = set(setup.call_args.kwargs["packages"])
    found = {".".join(p.parent.relative_to(ROOT).parts) for p in (ROOT / "pvscan").rglob("__init__.py")}
    assert found - shipped == set()
    for pkg, folder in PYPROJECT["tool"]["setuptools"]["package-dir"].items():
        assert pkg in shipped and (ROOT / folder / "__init__.py").is_file()


def test_data_files_come_from_the_package():
    """Settings and schemas are read through importlib.resources (pvscan.pipelines/.schemas)."""
    from pvscan.io import resources

    for pkg, name in (("pvscan.pipelines", "post_flight.toml"), ("pvscan.schemas", "flight.schema.json")):
        spec = importlib.util.find_spec(pkg)
        assert spec is not None, f"{pkg} is not importable: reinstall (make install)"
        assert (importlib.resources.files(pkg) / name).is_file()
    assert resources.DEFAULT_PIPELINE.is_file()
    assert resources.load_schema("pipeline/zonal.schema.json")["type"] == "object"


def test_every_import_is_declared():
    """Third-party packages imported by pvscan/ are runtime dependencies (or the optional
    `distributed` extra); test-only packages are not imported by the library."""
    deps = {_dist_name(r) for r in PYPROJECT["project"]["dependencies"]}
    extras = PYPROJECT["project"]["optional-dependencies"]
    optional = {_dist_name(r) for r in extras["distributed"]}
    test_only = {_dist_name(r) for r in extras["test"]} - optional
    dists = importlib.metadata.packages_distributions()
    missing = {}
    for mod, files in _third_party(_top_level_imports(ROOT / "pvscan")).items():
        names = {_dist_name(d) for d in dists.get(mod, [mod])}
        assert not names & test_only, f"{mod} is a test-only package but pvscan imports it: {sorted(files)}"
        if not names & (deps | optional):
            missing[mod] = sorted(files)
    assert missing == {}, "declare these in [project] dependencies"


def test_test_imports_are_in_the_test_extra():
    deps = {_dist_name(r) for r in PYPROJECT["project"]["dependencies"]}
    extras = PYPROJECT["project"]["optional-dependencies"]
    declared = deps | {_dist_name(r) for rs in extras.values() for r in rs}
    dists = importlib.metadata.packages_distributions()
    imports = _third_party(_top_level_imports(ROOT / "tests"))
    local = {p.stem for p in (ROOT / "tests").glob("*.py")}
    missing = {m: sorted(f) for m, f in imports.items()
               if m not in local and not {_dist_name(d) for d in dists.get(m, [m])} & declared}
    assert missing == {}, "declare these in the test extra"
