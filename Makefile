# pvscan: two commands do all the set-up on a fresh machine.
#   make demo   -> creates .venv, installs, simulates the demo flight if needed, runs the pipeline
#   make test   -> installs the test extras, runs the test suite
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
PVSCAN := $(VENV)/bin/pvscan
DEMO_FLIGHT := demo_site/flight
DEMO_OUT    := demo_out

.PHONY: demo test install bench browser-deps clean

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

bench: $(VENV)/.installed
	$(PY) -m pip install --quiet -e '.[test,bench]'
	$(PY) benchmarks/bench_inspect.py

# Headless Chromium for the report's browser test (Debian packages); needs root.
browser-deps:
	command -v chromium >/dev/null 2>&1 || (apt-get update -qq && apt-get install -y -qq chromium >/dev/null)

clean:
	rm -rf $(DEMO_OUT) $(DEMO_FLIGHT) .pytest_cache
