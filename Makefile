# veil: `make demo` runs the main job on the committed sample, `make test` runs every check.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-dev

.PHONY: demo test lint typecheck unit bench reliability clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/python -m veil.demo

# Speed, as ratios against baselines in the same run (not part of `make test`: these machines are noisy).
bench: $(STAMP)
	$(BIN)/python benchmarks/run.py

# Load, rollback under load, faults, kill -9 loops, bad input, fuzzing, security, at full size (a fast subset is in
# `make test`). Loopback only; prints one table and writes the figures to reliability/results/latest.json.
reliability: $(STAMP)
	$(BIN)/python -m reliability.run --json reliability/results/latest.json

lint: $(STAMP)
	$(BIN)/ruff check service client tests scripts benchmarks reliability
	$(BIN)/ruff format --check service client tests scripts benchmarks reliability

typecheck: $(STAMP)
	$(BIN)/mypy

# Two worker processes: most tests are single-threaded Python, and the 2-core machines the suite must fit on
# (under ten minutes) run it in about three quarters of the time.  TEST_WORKERS=0 runs it in one process.
TEST_WORKERS ?= 2

unit: $(STAMP)
	$(BIN)/pytest -n $(TEST_WORKERS)

test: lint typecheck unit

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache .hypothesis
