# Two commands on a fresh machine: `make demo` and `make test`.
# Each creates the virtual environment in .venv and installs what it needs.

PYTHON ?= python3
VENV ?= .venv
BIN = $(VENV)/bin

.PHONY: demo test test-pg lint bench clean

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

# The whole suite again on PostgreSQL: on the server of $ADVISORY_TEST_DB (a URL of a database there from
# which the tests may create and drop others), else on a throw-away cluster started for the run.
test-pg: $(BIN)/.installed
	@if [ -n "$$ADVISORY_TEST_DB" ]; then $(BIN)/python -m pytest; \
	else bash .ci/pg-cluster run $(BIN)/python -m pytest; fi

bench: $(BIN)/.installed
	for f in benchmarks/bench_*.py; do echo "== $$f"; $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) demo-output .pytest_cache .ruff_cache
