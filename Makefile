# Two entry points for users (see README): `make demo` and `make test`.
# Both bootstrap .venv from nothing but python3.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo example test lint bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test,plot,demo]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/zeroline demo --duration 30

example: $(STAMP)
	$(BIN)/zeroline fit config/examples/pressure_log.csv --y value --basis config/examples/pressure_basis.yaml

test: $(STAMP)
	$(BIN)/ruff check daemon tests bench
	$(BIN)/mypy
	$(BIN)/pytest

bench: $(STAMP)
	$(BIN)/python bench/fit_accuracy.py

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache
