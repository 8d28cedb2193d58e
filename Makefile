# The two commands of the README. Each prepares (or reuses) .venv first (scripts/setup.sh).
VENV ?= .venv
PY := $(VENV)/bin/python

.PHONY: setup setup-plan demo test test-fast test-kwant lint bench clean-venv

setup:
	@VENV=$(VENV) bash scripts/setup.sh

# only detect: the install route, what the set-up would do, and the other routes' commands
setup-plan:
	@VENV=$(VENV) bash scripts/setup.sh --plan

demo: setup
	$(PY) -m pipeline.cli demo --out demo-output

test: setup
	$(PY) -m pytest -q

test-fast: setup
	$(PY) -m pytest -q -m "not slow"

# Kwant's own test suite on the installed Kwant (exclusions and their reasons in the script)
test-kwant: setup
	VENV=$(VENV) bash scripts/kwant_tests.sh

# the layers contract and ruff on their own (tests/test_architecture.py runs both in `make test`)
lint: setup
	$(VENV)/bin/lint-imports
	$(VENV)/bin/ruff check .

clean-venv:
	rm -rf $(VENV)
