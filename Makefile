# Two commands set everything up on a fresh machine: `make run` and `make test`.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
DEMO := service/data/demo_network.json
HOST ?= 127.0.0.1
PORT ?= 8000

.PHONY: run test demo lint bench bench-store clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --upgrade pip

# Re-install when the project's metadata changes; the stamp keeps repeated runs fast.
$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -e '.[test]'
	touch $@

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -e .
	touch $@

test: $(VENV)/.installed-test
	$(BIN)/python -m pytest

lint: $(VENV)/.installed-test
	$(BIN)/ruff check solver service tests benchmarks
	$(BIN)/ruff format --check solver service tests benchmarks
	$(BIN)/mypy

demo: $(VENV)/.installed
	$(BIN)/stockrelay solve $(DEMO)

# The API and one solve worker on the database of STOCKRELAY_DATABASE_URL (default: SQLite in
# ./var), with the demo network loaded once; Ctrl-C stops both (see service/supervisor.py).
run: $(VENV)/.installed
	$(BIN)/stockrelay migrate
	$(BIN)/stockrelay networks import $(DEMO) --criteria discounted,average --skip-unchanged
	$(BIN)/stockrelay run --host $(HOST) --port $(PORT)

bench: $(VENV)/.installed-test
	$(BIN)/python benchmarks/solve.py

bench-store: $(VENV)/.installed-test
	$(BIN)/python benchmarks/store.py

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache
