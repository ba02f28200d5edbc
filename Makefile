# stopwise: every target creates and reuses .venv with the machine's python3.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp
DEMO_STAMP := $(VENV)/.demo-stamp
PYTEST_ARGS ?=
# the suite runs in parallel pytest processes (pytest-xdist): one per core, at most 4
PYTEST_WORKERS ?= auto
PYTEST_PARALLEL := -n $(PYTEST_WORKERS) --maxprocesses 4 --dist loadfile

.PHONY: demo test test-slow bench lint format clean

# the demo needs stopwise only; the test tools (incl. a compiled game solver) install once
# for test, bench and lint
$(DEMO_STAMP): pyproject.toml
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e .
	@touch $(DEMO_STAMP)

$(STAMP): pyproject.toml
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	@touch $(STAMP) $(DEMO_STAMP)

demo: $(DEMO_STAMP)  ## write the demo data, fit and compare models, write demo_output/report.html
	$(BIN)/stopwise demo --out demo_output

test: $(STAMP)  ## the whole fast suite (slow statistical checks: make test-slow)
	$(BIN)/python -m pytest -m "not slow" $(PYTEST_PARALLEL) $(PYTEST_ARGS)

test-slow: $(STAMP)  ## the slow statistical checks only
	$(BIN)/python -m pytest -m slow $(PYTEST_PARALLEL) $(PYTEST_ARGS)

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
