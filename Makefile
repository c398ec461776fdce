# dopplerkit: the two commands of the README, and a few helpers for developers.
# Each target creates/updates the local virtual environment .venv itself.

PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint format bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[all]"
	touch $(STAMP)

## demo: run the main job on the bundled demo data
demo: $(STAMP)
	$(BIN)/dopplerkit demo

## test: run the whole test suite (lint included)
test: $(STAMP)
	$(BIN)/ruff check dopplerkit tests benchmarks
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check dopplerkit tests benchmarks
	$(BIN)/ruff format --check dopplerkit tests benchmarks

format: $(STAMP)
	$(BIN)/ruff format dopplerkit tests benchmarks
	$(BIN)/ruff check --fix dopplerkit tests benchmarks

bench: $(STAMP)
	for f in benchmarks/bench_*.py; do $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) .pytest_cache .ruff_cache results test-artifacts
