# pvscan: two commands do all the set-up on a fresh machine.
#   make demo   -> creates .venv, installs, simulates the demo flight if needed, runs the pipeline
#   make test   -> installs the test extras, runs the test suite
#   make lint   -> ruff check (style, imports, likely bugs) and mypy (types) of pvscan/ and tests/
#   make wheel-check -> builds a wheel, installs it (not editable) into a fresh venv in a
#                  temporary folder and inspects a simulated flight from there (CI runs it)
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
PVSCAN := $(VENV)/bin/pvscan
DEMO_FLIGHT := demo_site/flight
DEMO_OUT    := demo_out

.PHONY: demo test lint install bench campaign browser-deps clean wheel-check test-floors

$(VENV)/.installed: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $@

install: $(VENV)/.installed

$(DEMO_FLIGHT)/flight.toml: demo_site/scenario.toml | $(VENV)/.installed
	$(PVSCAN) simulate demo_site/scenario.toml --out $(DEMO_FLIGHT) --seed 20260614 --overwrite

demo: $(VENV)/.installed $(DEMO_FLIGHT)/flight.toml
	$(PVSCAN) inspect $(DEMO_FLIGHT)/flight.toml --out $(DEMO_OUT) --overwrite
	$(PVSCAN) evaluate $(DEMO_FLIGHT) $(DEMO_OUT)
	@echo "Demo outputs are in $(DEMO_OUT)/ (open $(DEMO_OUT)/report.html in a browser)."

test: $(VENV)/.installed
	$(PY) -m pytest -q

# Lint and type check (configured in pyproject.toml: [tool.ruff], [tool.mypy]).
lint: $(VENV)/.installed
	$(VENV)/bin/ruff check pvscan tests
	$(VENV)/bin/mypy pvscan

# A real install: wheel -> fresh venv (no -e) -> `pvscan inspect` run outside the repository.
wheel-check:
	@set -e; work=$$(mktemp -d); trap 'rm -rf "$$work"' EXIT; repo=$$(pwd); \
	$(PYTHON) -m venv "$$work/venv"; \
	"$$work/venv/bin/pip" install --quiet --upgrade pip; \
	"$$work/venv/bin/pip" wheel --quiet --no-deps -w "$$work/dist" .; \
	"$$work/venv/bin/pip" install --quiet "$$work"/dist/pvscan-*.whl; \
	cd "$$work"; \
	"$$work/venv/bin/python" -c "import pvscan, sys; sys.exit(0 if '$$repo' not in pvscan.__file__ else 'pvscan imported from the repository')"; \
	"$$work/venv/bin/pvscan" -q simulate "$$repo/tests/scenarios/all_defects_rotated.toml" --out flight --seed 1; \
	"$$work/venv/bin/pvscan" inspect flight/flight.toml --out result; \
	test -s result/summary.json -a -s result/report.html; \
	echo "wheel-check: the installed wheel inspected a simulated flight in $$work"

# The test suite with every runtime dependency at its floor in pyproject.toml (a numpy 1.26
# stack; the two ignored warnings come from geopandas 1.0 / pyproj under numpy 1.26).
FLOORS_VENV ?= .venv-floors
test-floors:
	$(PYTHON) -m venv $(FLOORS_VENV)
	$(FLOORS_VENV)/bin/pip install --quiet --upgrade pip
	$(FLOORS_VENV)/bin/pip install --quiet --only-binary :all: 'pyparsing<3.3' 'pytest>=8' 'hypothesis>=6.100' 'scikit-image==0.22.*' \
	  $$($(PYTHON) -c "import tomllib; d = tomllib.load(open('pyproject.toml', 'rb'))['project']; print(' '.join(r.split('#')[0].split(';')[0].strip().replace('>=', '==') for r in d['dependencies'] + d['optional-dependencies']['distributed']))")
	$(FLOORS_VENV)/bin/pip install --quiet --no-deps -e .
	$(FLOORS_VENV)/bin/python -m pytest -q -p no:cacheprovider \
	  -W "ignore:The 'shapely.geos' module is deprecated:DeprecationWarning" \
	  -W "ignore:Conversion of an array with ndim:DeprecationWarning"

bench: $(VENV)/.installed
	$(PY) -m pip install --quiet -e '.[test,bench]'
	$(PY) benchmarks/bench_inspect.py

# Accuracy over 102 random flights nobody tuned on (9 families x 11 + 3 demo seeds; calibration
# seeds 0-4, held-out seeds 200000-200005; demo 0 and 200000-200001), niced, two workers;
# records and a markdown summary in the git-ignored .campaign/latest/ (about an hour on a
# shared 2-core machine).
CAMPAIGN_ARGS ?= --per-family 11 --demo-seeds 3 --workers 2 --held-out-seeds 200000-200999
campaign: $(VENV)/.installed
	nice -n 10 $(PY) benchmarks/campaign.py $(CAMPAIGN_ARGS) --out .campaign/latest --notes .campaign/latest/notes.md

# Headless Chromium for the report's browser test (Debian packages); needs root.
browser-deps:
	command -v chromium >/dev/null 2>&1 || (apt-get update -qq && apt-get install -y -qq chromium >/dev/null)

clean:
	rm -rf $(DEMO_OUT) $(DEMO_FLIGHT) .pytest_cache
