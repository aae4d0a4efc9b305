# Two entry points for a fresh machine (see README): `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
# Second venv: the real-engine tests again under pyspark 3.5.x (tests/requirements-engine35.txt).
VENV35 ?= .venv35
BIN35  := $(VENV35)/bin
# Third venv, for benchmarks only: the tool with its own dependencies and nothing else, as users
# install it (the test extra brings pandas, which pyarrow imports in every process when present).
VENVTOOL ?= .venv-tool

.PHONY: demo test install install-test install-engine35 install-tool engine-test engine-test-35 clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

install: $(BIN)/python
	$(BIN)/pip install --quiet -e .

install-test: $(BIN)/python
	$(BIN)/pip install --quiet -e '.[test]'

demo: install
	PATH="$(abspath $(BIN)):$$PATH" bash demo_checkpoints/run_demo.sh

$(BIN35)/python:
	$(PYTHON) -m venv $(VENV35)
	$(BIN35)/python -m pip install --quiet --upgrade pip

# The project without its dependencies (its test extra pins pyspark 4.x); they are in the list.
install-engine35: $(BIN35)/python
	$(BIN35)/pip install --quiet -r tests/requirements-engine35.txt
	$(BIN35)/pip install --quiet --no-deps -e .

$(VENVTOOL)/bin/python:
	$(PYTHON) -m venv $(VENVTOOL)
	$(VENVTOOL)/bin/python -m pip install --quiet --upgrade pip

install-tool: $(VENVTOOL)/bin/python
	$(VENVTOOL)/bin/pip install --quiet -e .

# The whole suite under pyspark 4.x, then the engine tests under pyspark 3.5.x.
test: install-test install-engine35
	$(BIN)/python -m pytest -q
	$(BIN35)/python -m pytest -q -m engine

engine-test: install-test
	$(BIN)/python -m pytest -q -m engine

engine-test-35: install-engine35
	$(BIN35)/python -m pytest -q -m engine

clean:
	rm -rf $(VENV) $(VENV35) $(VENVTOOL) .pytest_cache build *.egg-info
	find migrate -name '*.so' -delete   # compiled helpers built in place by `pip install -e .`
