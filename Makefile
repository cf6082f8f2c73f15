# Two commands on a fresh machine: `make demo` and `make test`.
# Each creates the virtual environment in .venv and installs what it needs.

PYTHON ?= python3
VENV ?= .venv
BIN = $(VENV)/bin

.PHONY: demo test lint bench clean

$(BIN)/.installed: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@

demo: $(BIN)/.installed
	$(BIN)/advisory demo

test: $(BIN)/.installed
	$(BIN)/ruff check advisory tests benchmarks demo-farm migrations
	$(BIN)/python -m pytest

bench: $(BIN)/.installed
	for f in benchmarks/bench_*.py; do echo "== $$f"; $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) demo-output .pytest_cache .ruff_cache
