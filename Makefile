# waneguide: two commands for a fresh clone (Python 3.11+ and make are all it needs).
#   make demo   -- set up .venv and run the whole job on the bundled, invented demo
#   make test   -- set up .venv and run the test suite (CI runs exactly this)
PY ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.waneguide-installed
PYTEST_ARGS ?=

.PHONY: setup demo test test-quick lint bench clean

$(STAMP): pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(STAMP)

setup: $(STAMP)

demo: $(STAMP)
	MLFLOW_DISABLE_TELEMETRY=true $(BIN)/waneguide demo --out demo-output

test: $(STAMP)
	$(BIN)/ruff check .
	MLFLOW_DISABLE_TELEMETRY=true $(BIN)/python -m pytest $(PYTEST_ARGS)

test-quick: $(STAMP)
	MLFLOW_DISABLE_TELEMETRY=true $(BIN)/python -m pytest -m "not slow" $(PYTEST_ARGS)

lint: $(STAMP)
	$(BIN)/ruff check .

bench: $(STAMP)
	for b in benchmarks/bench_*.py; do echo "== $$b"; $(BIN)/python $$b || exit 1; done

clean:
	rm -rf $(VENV) demo-output .pytest_cache
