# scenemon: `make demo` and `make test` set everything up on a fresh machine.
PYTHON ?= python3
VENV   ?= .venv
BIN     = $(VENV)/bin
STAMP   = $(VENV)/.installed

.PHONY: demo demo-fast test test-fast lint bench models pictures clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)            ## the demo model on the demo scene tour, at real-time pace
	$(BIN)/scenemon demo

demo-fast: $(STAMP)
	$(BIN)/scenemon demo --fast

test: $(STAMP)            ## the whole test suite
	$(BIN)/python -m pytest -q -ra

test-fast: $(STAMP)       ## the tests that need neither much time nor system parts (under a minute)
	$(BIN)/python -m pytest -q -ra -n 2 -m "not slow and not system"

lint: $(STAMP)
	$(BIN)/ruff check monitor tests benchmarks docs

bench: $(STAMP)           ## speed figures for the README: against the floor, then per stage
	$(BIN)/python benchmarks/bench_floor.py
	$(BIN)/python benchmarks/bench_pipeline.py

pictures: $(STAMP)        ## the README's pictures, from a real run of the demo (headless Chromium for the report)
	$(BIN)/python docs/pictures.py

models: $(STAMP)          ## rebuild the demo model artifacts (deterministic, about 2 minutes)
	$(BIN)/python -m monitor.demo.build --out models
	$(BIN)/python -m monitor.demo.profile --models models

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache
