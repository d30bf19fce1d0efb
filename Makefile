# dka-cohort: every target works on a fresh machine with nothing but Python 3.11+.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEMO_DIR ?= demo-output

.PHONY: setup demo test test-all bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

setup: $(STAMP)

demo: $(STAMP)
	$(BIN)/dka-cohort demo --out $(DEMO_DIR) --force

test: $(STAMP)
	$(BIN)/python -m pytest -m "not slow" -q

test-all: $(STAMP)
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python benchmarks/run_all.py --persons $${BENCH_PERSONS:-1000000} --root $${BENCH_ROOT:-bench-output}

clean:
	rm -rf $(VENV) $(DEMO_DIR) build dist .pytest_cache
