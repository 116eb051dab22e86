# The two commands of the README, and a few for contributors.
# Both bootstrap .venv on a fresh clone: only Python 3.11+ and make are needed.

PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-$(shell cat pyproject.toml | cksum | cut -d' ' -f1)

.PHONY: demo test test-fast lint bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e ".[test]"
	rm -f $(VENV)/.installed-*
	touch $(STAMP)

demo: $(STAMP)
	rm -rf demo-study
	$(BIN)/harmonize demo demo-study

# The audit report's browser test drives Debian's chromium (through playwright; never
# `playwright install`). CI runs as root on a fresh machine: install it when it is missing.
/usr/bin/chromium:
	apt-get update
	apt-get install -y --no-install-recommends chromium

test: $(STAMP) /usr/bin/chromium
	$(BIN)/python -m pytest -q
	$(BIN)/ruff check harmonize cli tests

# The development lane: everything in-process but the slow, browser and Dask tests (make test
# runs all, child processes included), on two processes (pytest-xdist), with the "fast"
# hypothesis profile (fewer examples). The tests' folders go to the memory file system when it
# has room (2 GB; a container's 64 MB /dev/shm does not): creating and deleting thousands of
# small stores there costs about a sixth less of the lane's time than on a disk.
FAST_TMP := $(shell [ -w /dev/shm ] && [ "$$(df --output=avail -k /dev/shm 2>/dev/null | tail -1)" -gt 2000000 ] 2>/dev/null && echo /dev/shm || echo $${TMPDIR:-/tmp})

test-fast: $(STAMP)
	TMPDIR=$(FAST_TMP) HYPOTHESIS_PROFILE=fast $(BIN)/python -m pytest -q -n 2 --dist loadfile -m "not slow and not browser and not dask and not subprocess"
	$(BIN)/ruff check harmonize cli tests

lint: $(STAMP)
	$(BIN)/ruff check harmonize cli tests benchmarks

bench: $(STAMP)
	$(BIN)/python -m benchmarks.run

clean:
	rm -rf $(VENV) demo-study .pytest_cache
