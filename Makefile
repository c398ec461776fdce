# dopplerkit: the two commands of the README, and a few helpers for developers.
# Each target creates/updates the local virtual environment .venv itself.

PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test docs lint format bench clean

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
	$(BIN)/ruff check dopplerkit tests benchmarks examples docs/conf.py
	$(BIN)/python -m pytest

## docs: the documentation site (warnings are errors), then its examples as doctests
docs: $(STAMP)
	$(BIN)/sphinx-build -W --keep-going -q -b html docs docs/_build/html
	$(BIN)/sphinx-build -W --keep-going -q -b doctest docs docs/_build/doctest
	@echo "open docs/_build/html/index.html"

lint: $(STAMP)
	$(BIN)/ruff check dopplerkit tests benchmarks examples docs/conf.py
	$(BIN)/ruff format --check dopplerkit tests benchmarks examples docs/conf.py

format: $(STAMP)
	$(BIN)/ruff format dopplerkit tests benchmarks examples docs/conf.py
	$(BIN)/ruff check --fix dopplerkit tests benchmarks examples docs/conf.py

bench: $(STAMP)
	for f in benchmarks/bench_*.py; do $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) .pytest_cache .ruff_cache results test-artifacts docs/_build docs/gallery
