# Two commands on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
BIN     = $(VENV)/bin
STAMP   = $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,bench]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/digest demo --dir demo

test: $(STAMP)
	$(BIN)/ruff check digest tests bench
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check digest tests bench

bench: $(STAMP)
	$(BIN)/python bench/stages.py

clean:
	rm -rf $(VENV) demo/data demo/out
