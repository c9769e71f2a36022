# Everything a fresh machine with Python 3.11, pip and make needs.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin

.PHONY: demo test install bench clean

$(BIN)/contentlab: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $@

install: $(BIN)/contentlab

demo: install
	$(BIN)/contentlab demo

test: install
	$(BIN)/python -m pytest

bench: install
	for b in benchmarks/bench_*.py; do $(BIN)/python $$b || exit 1; done

clean:
	rm -rf $(VENV) demo-workspace .pytest_cache
