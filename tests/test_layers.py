"""Imports point one way: down the layers of DEVELOPERS.md ("Package map").

Every module of ``pvscan/`` is parsed with :mod:`ast` (nothing is imported); each import of
another pvscan module (``import``, ``from ... import``, relative imports resolved, imports
inside functions included) must go to the module's own layer or one below it. The simulator
is a column of its own: it may use only the error family, the packaged resources and the
shared type aliases, and no core layer imports it (a yardstick that moves with the thing it
measures measures nothing; see also tests/test_sim_independence.py). Some packages are held
to less than their layer allows (``ONLY``: physics uses no files, manifests or settings;
``FORBIDDEN``: the report does not measure, the evaluation does not use the stages it
checks). ``pvscan/__init__.py`` only names the public API lazily and is exempt, as is
``from pvscan import __version__``. Own rule of the project, after the layering of the
libraries it is modelled on (rasterio keeps its CLI in ``rio/``; pvlib keeps all file access
in ``iotools/``).
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PKG = ROOT / "pvscan"

#: Layer of each top-level name under ``pvscan`` (a module or a subpackage), lowest first;
#: DEVELOPERS.md draws the same picture.
LAYERS: dict[str, int] = {
    "_typing": 0, "errors": 0, "robust": 0, "tasks": 0,
    "io": 1,
    "physics": 2,
    "measure": 3,
    "diagnose": 4,
    "pipeline": 5, "fleet": 5, "evaluate": 5, "layout_scores": 5, "report": 5, "history": 5,
    "cli": 6,
}
#: The simulator: what it may import, and who may import it.
SIMULATOR = "simulate"
SIMULATOR_MAY_USE = ("pvscan.errors", "pvscan.io.resources", "pvscan._typing")
SIMULATOR_USERS = ("evaluate", "cli")
#: Packages held to a shorter list than their layer allows: what they may import beside
#: themselves, and why.
ONLY: dict[str, tuple[tuple[str, ...], str]] = {
    "physics": (("pvscan.errors", "pvscan._typing", "pvscan.robust"),
                "physics is functions of numbers: no files, manifests or settings"),
}
#: Imports forbidden although they point down: (importer prefix, imported prefix, why).
FORBIDDEN: tuple[tuple[str, str, str], ...] = (
    ("pvscan.report", "pvscan.measure", "the report draws the results, it does not measure"),
    ("pvscan.report", "pvscan.pipeline", "the report draws the results, it does not run the pipeline"),
    ("pvscan.report", "pvscan.fleet", "the report draws the results, it does not run the pipeline"),
    ("pvscan.evaluate", "pvscan.physics", "the yardstick does not use the physics it checks"),
    ("pvscan.evaluate", "pvscan.measure", "the yardstick does not use the stages it checks"),
    ("pvscan.evaluate", "pvscan.diagnose", "the yardstick does not use the stages it checks"),
    ("pvscan.evaluate", "pvscan.pipeline", "the yardstick does not use the stages it checks"),
    ("pvscan.evaluate", "pvscan.robust", "the yardstick does not use the statistics of the stages it checks"),
    ("pvscan.layout_scores", "pvscan.measure", "the yardstick does not use the stages it checks"),
    ("pvscan.layout_scores", "pvscan.robust", "the yardstick does not use the statistics of the stages it checks"),
)

#: Imports that still point the wrong way, each with the reason it is still there. An entry
#: that no longer occurs fails the test below: remove it when the import is gone.
KNOWN_UPWARD: dict[tuple[str, str], str] = {
    ("pvscan.io.writers.geojson", "pvscan.diagnose.loss"): "per-module loss shares (module_losses)",
    ("pvscan.io.writers.summary", "pvscan.diagnose.loss"): "per-module loss shares (module_losses)",
    ("pvscan.io.writers.walk", "pvscan.diagnose.rank"): "anomaly ids (assign_anomaly_ids)",
    ("pvscan.measure.register.physics", "pvscan.diagnose.thermal"): "reference conditions (Normalisation)",
    ("pvscan.physics.radiometry", "pvscan.io.manifest"): "flight_radiometry reads a Flight's keywords",
    ("pvscan.physics.radiometry", "pvscan.io.settings"): "flight_radiometry reads [radiometry]",
}


def _module_name(path: Path, root: Path = ROOT) -> str:
    parts = path.relative_to(root).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(path: Path, root: Path = ROOT) -> set[str]:
    """The pvscan modules a file imports, relative imports resolved."""
    name = _module_name(path, root)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            found.add(mod)
    return {m for m in found if m == "pvscan" or m.startswith("pvscan.")}


def _under(module: str, prefix: str) -> bool:
    return module == prefix or module.startswith(prefix + ".")


def _top(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def _wrong_way(importer: str, imported: str) -> str | None:
    """Why an import points the wrong way (None when it is allowed)."""
    if "pvscan" in (importer, imported):  # the package's face: lazy public names, __version__
        return None
    a, b = _top(importer), _top(imported)
    if a == b:
        return None
    if a == SIMULATOR:
        ok = any(imported == m or imported.startswith(m + ".") for m in SIMULATOR_MAY_USE)
        return None if ok else "the simulator shares no code with the pipeline"
    if b == SIMULATOR:
        return None if a in SIMULATOR_USERS else "the core never imports the simulator"
    if a not in LAYERS or b not in LAYERS:
        return f"{a if a not in LAYERS else b!r} has no layer (add it to LAYERS and to DEVELOPERS.md)"
    if LAYERS[b] > LAYERS[a]:
        return f"layer {a} ({LAYERS[a]}) imports layer {b} ({LAYERS[b]})"
    if a in ONLY:
        allowed, why = ONLY[a]
        if not any(_under(imported, m) for m in allowed):
            return f"{a} imports only {', '.join(allowed)}: {why}"
    for src, dst, why in FORBIDDEN:
        if _under(importer, src) and _under(imported, dst):
            return why
    return None


def _all_edges(root: Path = ROOT) -> list[tuple[str, str, str]]:
    """(importer, imported, why) of every import of ``root/pvscan`` that points the wrong way."""
    edges = []
    for path in sorted((root / "pvscan").rglob("*.py")):
        importer = _module_name(path, root)
        for imported in sorted(_imports(path, root)):
            why = _wrong_way(importer, imported)
            if why:
                edges.append((importer, imported, why))
    return edges


def test_every_top_level_name_has_a_layer():
    names = {p.stem if p.is_file() else p.name for p in PKG.iterdir()
             if (p.suffix == ".py") or (p.is_dir() and (p / "__init__.py").is_file())}
    missing = sorted(names - set(LAYERS) - {SIMULATOR, "__init__"})
    assert missing == [], f"modules of pvscan/ without a layer: {missing}"


def test_imports_point_down_the_layers():
    wrong = [f"{a} -> {b}: {why}" for a, b, why in _all_edges() if (a, b) not in KNOWN_UPWARD]
    assert wrong == [], "imports pointing the wrong way:\n" + "\n".join(wrong)


def test_known_upward_imports_still_exist():
    edges = {(a, b) for a, b, _ in _all_edges()}
    stale = [k for k in KNOWN_UPWARD if k not in edges]
    assert stale == [], f"KNOWN_UPWARD entries no longer needed (remove them): {stale}"


@pytest.mark.parametrize("importer, imported, expected", [
    ("pvscan.physics.heat", "pvscan.diagnose.thermal", "layer physics"),
    ("pvscan.io.ortho", "pvscan.measure.zonal", "layer io"),
    ("pvscan.pipeline", "pvscan.cli.main", "layer pipeline"),
    ("pvscan.measure.zonal", "pvscan.simulate.scene", "never imports the simulator"),
    ("pvscan.simulate.scene", "pvscan.physics.planck", "shares no code"),
    ("pvscan.diagnose.classify", "pvscan.measure.seams", None),
    ("pvscan.cli.simulate", "pvscan.simulate", None),
    ("pvscan.simulate.scenario", "pvscan.io.resources", None),
    ("pvscan.simulate.electrical", "pvscan.io.manifest", "shares no code"),
    ("pvscan.physics.heat", "pvscan.io.settings", "physics imports only"),
    ("pvscan.physics.heat", "pvscan.robust", None),
    ("pvscan.physics.sky", "pvscan.physics.planck", None),
    ("pvscan.io.writers.summary", "pvscan.report._build", "layer io"),
    ("pvscan.io.ortho", "pvscan.diagnose.rank", "layer io"),
    ("pvscan.report._build", "pvscan.measure.zonal", "does not measure"),
    ("pvscan.report._build", "pvscan.pipeline", "does not run the pipeline"),
    ("pvscan.report._build", "pvscan.io.records", None),
    ("pvscan.evaluate", "pvscan.diagnose.classify", "yardstick"),
    ("pvscan.evaluate", "pvscan.simulate.scenario", None),
    ("pvscan.evaluate", "pvscan.robust", "statistics"),
    ("pvscan.layout_scores", "pvscan.measure.register", "yardstick"),
    ("pvscan.history.store", "pvscan.cli._common", "layer history"),
    ("pvscan.diagnose.loss", "pvscan.simulate.electrical", "never imports the simulator"),
    ("pvscan.measure.zonal", "pvscan.physics.radiometry", None),
])
def test_the_rule_itself(importer, imported, expected):
    """The checker catches what it should (so an empty list above means something)."""
    why = _wrong_way(importer, imported)
    if expected is None:
        assert why is None
    else:
        assert why is not None and expected in why


def test_relative_imports_are_resolved(tmp_path):
    pkg = tmp_path / "pvscan" / "physics"
    pkg.mkdir(parents=True)
    src = pkg / "x.py"
    src.write_text("from ..diagnose import thermal\nfrom . import heat\n\n\ndef f():\n    import pvscan.cli.main\n")
    assert _imports(src, tmp_path) == {"pvscan.diagnose", "pvscan.physics", "pvscan.cli.main"}


#: A small package with one wrong import of each kind; the whole scan must find exactly these.
_SYNTHETIC = {
    "pvscan/__init__.py": "from pvscan.pipeline import inspect_flight\n",
    "pvscan/errors.py": "",
    "pvscan/physics/__init__.py": "",
    "pvscan/physics/heat.py": "from pvscan.errors import PvscanError\nfrom pvscan.io.settings import section\n",
    "pvscan/io/__init__.py": "",
    "pvscan/io/settings.py": "from pvscan.errors import PvscanError\n",
    "pvscan/io/ortho.py": "def f():\n    from ..measure import zonal\n",
    "pvscan/measure/__init__.py": "",
    "pvscan/measure/zonal.py": "import pvscan.physics.heat\nfrom pvscan.simulate import scene\n",
    "pvscan/diagnose/__init__.py": "",
    "pvscan/diagnose/rank.py": "from pvscan.cli import main\n",
    "pvscan/report/__init__.py": "from pvscan.measure.zonal import stats\nfrom pvscan.io import settings\n",
    "pvscan/simulate/__init__.py": "",
    "pvscan/simulate/scene.py": "from pvscan.physics import heat\nfrom pvscan.errors import PvscanError\n",
    "pvscan/pipeline.py": "from pvscan import report\nfrom pvscan.diagnose import rank\n",
    "pvscan/cli/__init__.py": "",
    "pvscan/cli/main.py": "from pvscan.pipeline import inspect_flight\nfrom pvscan.simulate import scene\n",
}


def test_the_scan_finds_each_wrong_import_in_a_synthetic_package(tmp_path):
    """Parsing, resolving and judging together: a package with planted wrong imports fails."""
    for rel, src in _SYNTHETIC.items():
        path = tmp_path / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(src, encoding="utf-8")
    found = {(a, b) for a, b, _ in _all_edges(tmp_path)}
    assert found == {
        ("pvscan.physics.heat", "pvscan.io.settings"),     # physics reads no settings
        ("pvscan.io.ortho", "pvscan.measure"),             # io below measure (relative, in a function)
        ("pvscan.measure.zonal", "pvscan.simulate"),       # the core never imports the simulator
        ("pvscan.diagnose.rank", "pvscan.cli"),            # nothing imports the CLI
        ("pvscan.report", "pvscan.measure.zonal"),         # the report does not measure
        ("pvscan.simulate.scene", "pvscan.physics"),       # the simulator has its own physics
    }
