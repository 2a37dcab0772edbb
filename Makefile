# Two entry points: `make demo` (the main job) and `make test` (the suite).
# Both create .venv on first use, install the CPU build of torch first (so pip never
# pulls a CUDA build), then the package in editable mode with its test extras.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test setup clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet torch==2.13.0
	$(PY) -m pip install --quiet -e '.[test,plots]'
	touch $(STAMP)

setup: $(STAMP)

demo: $(STAMP)
	$(PY) -m pnpguard.demo

test: $(STAMP)
	$(PY) -m pytest -q

clean:
	rm -rf $(VENV) .pytest_cache .hypothesis
