# streamcount developer commands. Each target sets up its own virtual environment (.venv)
# on first use, so on a fresh machine with Python 3.11+ one command does everything.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
RUNTIME := $(VENV)/.runtime

.PHONY: demo test test-fast lint typecheck fmt bench clean tools

# The external programs the tests drive, each as program=Debian package. tests/tools.py holds
# the same table (tests/test_tools.py checks the two agree).
TOOLS := promtool=prometheus nats-server=nats-server chromium=chromium chromedriver=chromium-driver
APT   := apt-get -o DPkg::Lock::Timeout=300 -qq

# the runtime dependencies only (what `make demo` needs)
$(RUNTIME): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e .
	touch $(RUNTIME)

# plus the test extra (pytest, hypothesis, scipy, jsonschema, ruff, mypy...)
$(STAMP): $(RUNTIME)
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

## demo: the invented shop's live feed with alerts as they fire (about 45 s)
demo: $(RUNTIME)
	$(BIN)/streamcount demo

## tools: install the external programs the tests drive from Debian's packages (as root with
## apt-get; otherwise say what is missing and carry on: those tests skip, or fail under CI=true)
tools:
	@PATH="$$PATH:/usr/sbin:/sbin"; missing=""; \
	for pair in $(TOOLS); do \
	  command -v "$${pair%%=*}" >/dev/null 2>&1 || missing="$$missing $${pair#*=}"; \
	done; \
	if [ -z "$$missing" ]; then exit 0; fi; \
	if [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
	  echo "tools: installing Debian packages:$$missing"; \
	  { $(APT) update && DEBIAN_FRONTEND=noninteractive $(APT) install -y --no-install-recommends $$missing; } \
	    || echo "tools: apt-get could not install$$missing; the tests needing them will say so"; \
	else \
	  echo "tools: missing Debian packages:$$missing (run 'make tools' as root to install them)"; \
	fi

## test: the whole suite, slow dataset checks included (what CI runs)
test: $(STAMP) tools
	$(BIN)/ruff check streamcount tests bench examples
	$(BIN)/ruff format --check streamcount tests bench examples
	$(BIN)/mypy
	$(BIN)/python -m pytest -q

## test-fast: everything but the tests marked slow
test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -m "not slow"

lint: $(STAMP)
	$(BIN)/ruff check streamcount tests bench examples
	$(BIN)/ruff format --check streamcount tests bench examples

## typecheck: mypy as configured in pyproject.toml (--strict for the counting core)
typecheck: $(STAMP)
	$(BIN)/mypy

fmt: $(STAMP)
	$(BIN)/ruff format streamcount tests bench examples
	$(BIN)/ruff check --fix streamcount tests bench examples

## bench: throughput and memory figures, appended to bench/RESULTS.md
bench: $(STAMP)
	$(BIN)/python bench/bench_replay.py --record

clean:
	rm -rf $(VENV) .pytest_cache .ruff_cache .mypy_cache .hypothesis build *.egg-info
