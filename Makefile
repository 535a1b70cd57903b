# sensorledger — `make run` serves the demo fleet, `make test` runs every suite.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: run test bench lint fmt clean

$(BIN)/python:
	@$(PYTHON) -c 'import sys; sys.exit(sys.version_info < (3, 11))' || \
	  { echo "sensorledger needs Python 3.11 or newer (set PYTHON=python3.x)"; exit 1; }
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	@touch $(STAMP)

run: $(STAMP)
	$(BIN)/sensorledger serve --demo

test: $(STAMP)
	$(BIN)/python -m pytest tests

bench: $(STAMP)
	$(BIN)/python -m tests.bench

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .
	$(BIN)/mypy

fmt: $(STAMP)
	$(BIN)/ruff check --fix .
	$(BIN)/ruff format .

clean:
	rm -rf $(VENV) .pytest_cache .ruff_cache .mypy_cache
