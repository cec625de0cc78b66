# Two commands: `make demo` and `make test`. Both create or reuse .venv.
PYTHON ?= python3.11
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test test-slow bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/tallyfit demo --out demo_run

test: $(STAMP)
	$(BIN)/python -m pytest -q

test-slow: $(STAMP)
	$(BIN)/python -m pytest -q -m slow

bench: $(STAMP)
	$(BIN)/python bench/chain_bench.py

clean:
	rm -rf $(VENV) demo_run
