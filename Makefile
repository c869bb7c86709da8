# The two set-up commands: `make demo` and `make test`. Both create the venv when it is missing.
PY ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test test-all lint bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip
	$(BIN)/python -m pip install -q -e ".[test]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/knowngood demo --out demo_out

lint: $(STAMP)
	$(BIN)/ruff check knowngood training service demo_parts tests
	$(BIN)/ruff format --check knowngood training service demo_parts tests

test: $(STAMP) lint
	$(BIN)/python -m pytest -q

test-all: $(STAMP)
	$(BIN)/python -m pytest -q -m ""

bench: $(STAMP)
	$(BIN)/python -m tests.bench --out bench_out/bench.json

clean:
	rm -rf demo_out bench_out .pytest_cache
