# All setup happens here so that a fresh clone needs only `make demo` or `make test`.
PY      ?= python3
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.wmplan-installed
DEMO_OUT ?= demo-out

.PHONY: setup test test-fast demo bench lint format clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	# The CPU build of torch first: a bare requirement would pull a multi-GB CUDA build.
	$(BIN)/python -m pip install --quiet "torch==2.13.0"
	$(BIN)/python -m pip install --quiet -e ".[notebooks,cluster,dev]"
	touch $(STAMP)

setup: $(STAMP)

test: $(STAMP)
	$(BIN)/python -m pytest -q

test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -m "not slow and not notebooks"

demo: $(STAMP)
	$(BIN)/wmplan demo --out $(DEMO_OUT)

bench: $(STAMP)
	$(BIN)/wmplan bench --json bench.json

lint: $(STAMP)
	$(BIN)/ruff format --check wmplan tests benchmarks notebooks/_build.py
	$(BIN)/ruff check wmplan tests benchmarks notebooks/_build.py

format: $(STAMP)
	$(BIN)/ruff format wmplan tests benchmarks notebooks/_build.py
	$(BIN)/ruff check --fix wmplan tests benchmarks notebooks/_build.py

clean:
	rm -rf $(VENV) $(DEMO_OUT) .pytest_cache
