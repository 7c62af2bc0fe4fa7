# Two commands on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
BIN     = $(VENV)/bin
STAMP   = $(VENV)/.installed

.PHONY: demo demo-postgres test lint bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,bench]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/digest demo --dir demo

# The demo read from the local PostgreSQL server: tables demo_units and demo_values of the
# database test on 127.0.0.1:5432 (another server: edit the URLs in demo/config-postgres.toml
# and give load_postgres.py --url).
demo-postgres: $(STAMP)
	$(BIN)/python demo/load_postgres.py
	$(BIN)/digest run --dry-run --config demo/config-postgres.toml

test: $(STAMP)
	$(BIN)/ruff check digest tests bench
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check digest tests bench

bench: $(STAMP)
	$(BIN)/python bench/stages.py

clean:
	rm -rf $(VENV) demo/data demo/out
