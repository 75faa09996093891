# Two entry points for a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/pip install --quiet -e ".[test,cluster,rosbag]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/gapgauge demo --out gapgauge-demo

test: $(STAMP)
	$(BIN)/ruff check src tests benchmarks
	$(BIN)/python -m pytest -q

lint: $(STAMP)
	$(BIN)/ruff check src tests benchmarks

bench: $(STAMP)
	$(BIN)/python benchmarks/sweep_throughput.py

clean:
	rm -rf $(VENV) build dist src/*.egg-info .pytest_cache .ruff_cache
