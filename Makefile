# Two commands set everything up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test test-fast bench clean-outputs

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test,distributed]'
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/trialcut demo

test: $(STAMP)
	$(PY) -m pytest -q

test-fast: $(STAMP)
	$(PY) -m pytest -q -m "not slow and not browser"

bench: $(STAMP)
	$(PY) benchmarks/run_all.py
