# Every target installs what it needs first, so each one works alone on a fresh clone.
# The install runs again only when pyproject.toml is newer than the stamp inside .venv
# (deleting .venv deletes the stamp with it).

PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.install-stamp
ARGS   ?=
TEST_PROCS ?= 2

.PHONY: run test lint bench install

install: $(STAMP)

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

## run: the embedded stack (redis, API, 2 workers, demo dataset); ARGS="--port 9000" to pass flags
run: $(STAMP)
	$(BIN)/sealfold up $(ARGS)

## test: the whole suite, in TEST_PROCS processes (pytest-xdist): most of its time is spent waiting on
## workers and servers the tests start, so two processes overlap those waits; TEST_PROCS=0 runs it in one
test: $(STAMP)
	$(BIN)/pytest -q -n $(TEST_PROCS) $(ARGS)

## lint: ruff and mypy
lint: $(STAMP)
	$(BIN)/ruff check service worker tests bench
	$(BIN)/mypy

## bench: service vs cross_validate at 1k and 1M rows (takes a few minutes)
bench: $(STAMP)
	$(BIN)/python bench/run.py $(ARGS)
