# Two commands set everything up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test bench lint mpy clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip
	$(BIN)/python -m pip install -q -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/feedmatch demo --out demo-out

test: $(STAMP)
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python host/benchmarks/run_bench.py

lint: $(STAMP)
	$(BIN)/ruff check host tests firmware

clean:
	rm -rf $(VENV) demo-out .pytest_cache .ruff_cache
