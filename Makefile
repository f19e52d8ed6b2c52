# requant: set-up, demo, tests and benchmarks.
# Each target installs what it needs into ./.venv on first use.

PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/requant demo --out demo_output

test: $(STAMP)
	$(BIN)/python -m pytest

bench: $(STAMP)
	$(BIN)/python benchmarks/bench_convert.py

clean:
	rm -rf $(VENV) demo_output bench_output .pytest_cache
