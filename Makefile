# Two entry points for a fresh machine with Python >= 3.11:
#   make run   - set up and run the built-in rules on the built-in problems
#   make test  - set up and run the tests (what CI runs)
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
# torch is an optional adapter and a test reference. Pin the CPU build: an
# unpinned torch with no torch installed pulls a multi-GB CUDA build.
TORCH  ?= torch==2.13.0

.PHONY: run test setup setup-test bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

setup: $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .

setup-test: $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]' '$(TORCH)'

run: setup
	$(BIN)/benchsuite run

test: setup-test
	$(BIN)/python -m pytest -q

bench: setup-test
	for f in benchmarks/*.py; do echo "== $$f"; $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .hypothesis
