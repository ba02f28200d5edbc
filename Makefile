# stopwise: every target creates and reuses .venv with the machine's python3.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp
PYTEST_ARGS ?=

.PHONY: demo test test-slow bench lint format clean

$(STAMP): pyproject.toml
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	@touch $(STAMP)

demo: $(STAMP)  ## write the demo data set, validate, describe, fit and compare models
	$(BIN)/stopwise demo --out demo_output

test: $(STAMP)  ## the whole fast suite (slow statistical checks: make test-slow)
	$(BIN)/python -m pytest -m "not slow" $(PYTEST_ARGS)

test-slow: $(STAMP)  ## the slow statistical checks only
	$(BIN)/python -m pytest -m slow $(PYTEST_ARGS)

bench: $(STAMP)  ## speed against in-process baselines -> benchmarks/RESULTS.md
	$(BIN)/python -m benchmarks.run

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

format: $(STAMP)
	$(BIN)/ruff check --fix .
	$(BIN)/ruff format .

clean:
	rm -rf demo_output .pytest_cache build *.egg-info
