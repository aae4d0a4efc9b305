# Two entry points for a fresh machine (see README): `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin

.PHONY: demo test install install-test engine-test clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

install: $(BIN)/python
	$(BIN)/pip install --quiet -e .

install-test: $(BIN)/python
	$(BIN)/pip install --quiet -e '.[test]'

demo: install
	PATH="$(abspath $(BIN)):$$PATH" bash demo_checkpoints/run_demo.sh

test: install-test
	$(BIN)/python -m pytest -q

engine-test: install-test
	$(BIN)/python -m pytest -q -m engine

clean:
	rm -rf $(VENV) .pytest_cache build *.egg-info
