# streamcount developer commands. Each target sets up its own virtual environment (.venv)
# on first use, so on a fresh machine with Python 3.11+ one command does everything.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test test-fast lint fmt bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

## demo: the invented shop's live feed with alerts as they fire (about 45 s)
demo: $(STAMP)
	$(BIN)/streamcount demo

## test: the whole suite, slow dataset checks included (what CI runs)
test: $(STAMP)
	$(BIN)/ruff check streamcount tests bench examples
	$(BIN)/ruff format --check streamcount tests bench examples
	$(BIN)/python -m pytest -q

## test-fast: everything but the tests marked slow
test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -m "not slow"

lint: $(STAMP)
	$(BIN)/ruff check streamcount tests bench examples
	$(BIN)/ruff format --check streamcount tests bench examples

fmt: $(STAMP)
	$(BIN)/ruff format streamcount tests bench examples
	$(BIN)/ruff check --fix streamcount tests bench examples

## bench: throughput and memory figures, appended to bench/RESULTS.md
bench: $(STAMP)
	$(BIN)/python bench/bench_replay.py --record

clean:
	rm -rf $(VENV) .pytest_cache .ruff_cache .hypothesis build *.egg-info
