# One command per job. `make test` is what CI runs; `make demo` runs the main job.
PYTHON ?= $(shell command -v python3.11 || command -v python3)
VENV ?= .venv
BIN := $(VENV)/bin
ONCE ?=
DEMO_ARGS ?=

.PHONY: test check demo bench clean

$(BIN)/.installed: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip
	$(BIN)/python -m pip install -q -e '.[test]'
	touch $@

check: $(BIN)/.installed
	$(BIN)/ruff format --check .
	$(BIN)/ruff check .
	$(BIN)/mypy

test: check
	$(BIN)/pytest -q

demo: $(BIN)/.installed
	$(BIN)/mistake-ledger demo $(if $(ONCE),--once,) $(DEMO_ARGS)

bench: $(BIN)/.installed
	$(BIN)/python -m benchmarks.learners
	$(BIN)/python -m benchmarks.service
	$(BIN)/python -m benchmarks.transfer
	$(BIN)/python -m benchmarks.at_once

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache
