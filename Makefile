# Two commands do all the set-up: `make demo` and `make test`.
# PYTHON may be overridden (e.g. make test PYTHON=python3.11).
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
TSTAMP := $(VENV)/.installed-test
PIP    := $(BIN)/python -m pip install --disable-pip-version-check -q

.PHONY: demo test lint bench clean install

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(STAMP): pyproject.toml | $(BIN)/python
	$(PIP) -e .
	touch $@

$(TSTAMP): pyproject.toml $(STAMP)
	$(PIP) -e ".[test]"
	touch $@

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/python demo/run_demo.py

# The suite runs on 2 cores; network-stage threads are pinned to 1 per worker.
test: $(TSTAMP)
	OMP_NUM_THREADS=1 MKL_NUM_THREADS=1 MPLBACKEND=Agg $(BIN)/python -m pytest -n 2 --dist loadfile -q

lint: $(TSTAMP)
	$(BIN)/ruff check compartments tests benchmarks demo

bench: $(TSTAMP)
	$(BIN)/python benchmarks/speed.py
	$(BIN)/python benchmarks/simulate.py
	$(BIN)/python benchmarks/nonlinear_rhs.py
	$(BIN)/python benchmarks/ode_driver.py
	$(BIN)/python benchmarks/estimator.py
	$(BIN)/python benchmarks/cohort.py
	$(BIN)/python benchmarks/design.py

clean:
	rm -rf $(VENV) build *.egg-info demo/out benchmarks/out .pytest_cache
