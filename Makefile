# The two commands of the README. Each prepares (or reuses) .venv first.
VENV ?= .venv
PY := $(VENV)/bin/python

.PHONY: setup demo test test-fast lint bench clean-venv

setup:
	@bash scripts/setup.sh

demo: setup
	$(PY) -m pipeline.cli demo --out demo-output

test: setup
	$(PY) -m pytest -q

test-fast: setup
	$(PY) -m pytest -q -m "not slow"

# the layers contract and ruff on their own (tests/test_architecture.py runs both in `make test`)
lint: setup
	$(VENV)/bin/lint-imports
	$(VENV)/bin/ruff check .

clean-venv:
	rm -rf $(VENV)
