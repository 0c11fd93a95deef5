# Two commands set everything up on a fresh machine: `make demo` and `make test`.
# Every package comes from requirements/lock.txt: exact versions, each with its SHA-256,
# so a rerun in six months installs the same numerical libraries (refresh: `make lock`).
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed
LOCK := requirements/lock.txt
LOCK_INPUTS := pyproject.toml requirements/build.in
# pip-tools lives in its own small venv: it is not part of the locked environment.
LOCK_TOOLS := $(VENV)/lock-tools
PIP_TOOLS := pip-tools==7.6.2
COMPILE := CUSTOM_COMPILE_COMMAND="make lock" $(LOCK_TOOLS)/bin/pip-compile --quiet \
	--generate-hashes --allow-unsafe --strip-extras --no-emit-index-url --no-emit-find-links \
	--extra test --extra distributed --output-file $(LOCK)

.PHONY: demo test test-fast bench clean-outputs lock lock-upgrade

# The lock installs with --require-hashes (a package missing from it, or a file whose hash
# differs, stops the install); the project itself adds no dependency of its own (--no-deps,
# built with the locked setuptools), and `pip check` fails if pyproject.toml asks for
# something the lock lacks.
$(STAMP): $(LOCK) pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --require-hashes -r $(LOCK)
	$(PY) -m pip install --quiet --no-deps --no-build-isolation -e .
	$(PY) -m pip check
	touch $(STAMP)

# The project's own modules compiled once, as an installed wheel has them: the environment sets
# PYTHONDONTWRITEBYTECODE, so without this every start compiles all of src/ again (about 0.2 s of
# each run).  Python still checks each file's time stamp, so an edited module is never run stale.
COMPILED := $(PY) -m compileall -q src >/dev/null

demo: $(STAMP)
	$(COMPILED)
	$(VENV)/bin/trialcut demo

test: $(STAMP)
	$(COMPILED)
	$(PY) -m pytest -q

test-fast: $(STAMP)
	$(COMPILED)
	$(PY) -m pytest -q -m "not slow and not browser"

bench: $(STAMP)
	$(COMPILED)
	$(PY) benchmarks/run_all.py

$(LOCK_TOOLS)/bin/pip-compile:
	$(PYTHON) -m venv $(LOCK_TOOLS)
	$(LOCK_TOOLS)/bin/python -m pip install --quiet '$(PIP_TOOLS)'

# Add what pyproject.toml newly asks for, keeping every existing pin.
lock: $(LOCK_TOOLS)/bin/pip-compile
	$(COMPILE) $(LOCK_INPUTS)

# Move every pin to the newest version pyproject.toml allows (review the diff!).
lock-upgrade: $(LOCK_TOOLS)/bin/pip-compile
	$(COMPILE) --upgrade $(LOCK_INPUTS)
