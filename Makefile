# branchwatch — the two commands a new machine needs: `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint typecheck unit bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev,fleet]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/branchwatch demo

lint: $(STAMP)
	$(BIN)/ruff check .

typecheck: $(STAMP)
	$(BIN)/mypy

unit: $(STAMP)
	$(BIN)/python -m pytest -q; rc=$$?; if [ $$rc -eq 5 ]; then echo "pytest collected no tests"; exit 0; fi; exit $$rc

test: lint typecheck unit

bench: $(STAMP)
	$(BIN)/python benchmarks/curve.py

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .mypy_cache .ruff_cache
