# stagewatch developer commands. `make help` lists them.
# Every target sets up .venv first, so `make test` works on a fresh clone.

SHELL := /bin/bash
.DEFAULT_GOAL := help

VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
PYTHON ?= python3

# numba's cache=True needs a writable directory, even to read cache hits; the
# estimator package keys its cache folder on a digest of its sources below this.
export STAGEWATCH_CACHE_DIR := $(CURDIR)/.cache

.PHONY: help venv run replay demo test bench bench-soak figures lint clean

help: ## List the targets
	@echo "stagewatch make targets:"
	@grep -E '^[a-z][a-zA-Z_-]*:.*## ' $(MAKEFILE_LIST) \
		| awk 'BEGIN {FS = ":.*## "} {printf "  %-10s %s\n", $$1, $$2}'

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install -e '.[dev]'
	touch $@

venv: $(STAMP) ## Create .venv and install stagewatch with its dev extras

run: $(STAMP) ## Start the service on 127.0.0.1 with the demo train and feed it the demo month, fast
	$(BIN)/stagewatch live-demo

replay: $(STAMP) ## Replay the demo month (replay_data/wrenfield) into out/wrenfield; print where the report is
	$(BIN)/stagewatch replay replay_data/wrenfield/archive.parquet \
		--config replay_data/wrenfield/train.toml \
		--truth replay_data/wrenfield/truth.parquet --out out/wrenfield
	@echo "Open out/wrenfield/report.html in a browser."

demo: $(STAMP) ## Simulate and estimate a short invented scenario; print estimates beside truth
	$(BIN)/stagewatch demo

test: $(STAMP) ## Install missing system packages (if any), then run the whole test suite
	bash scripts/system-deps.sh
	$(BIN)/pytest

bench: $(STAMP) ## Time the filter against its reference, replay a month and a year, load-test the service
	bash scripts/system-deps.sh --bench
	$(BIN)/python bench/bench_filter.py
	$(BIN)/python bench/bench_replay.py
	$(BIN)/python bench/bench_service.py

# Not part of `make test` or CI. Shorter: make bench-soak SOAK_ARGS="--minutes 1"
bench-soak: $(STAMP) ## Soak the service 10 min at 5,000 readings/s over 200 trains: memory, queue, latency
	$(BIN)/python bench/bench_soak.py $(SOAK_ARGS)

figures: $(STAMP) ## Alert figures on simulated months: false alarms, warning time of a slow deactivation
	$(BIN)/python bench/alert_figures.py

lint: $(STAMP) ## ruff check, then mypy
	$(BIN)/ruff check estimator service tests bench
	$(BIN)/mypy

clean: ## Remove .venv and every cache
	rm -rf $(VENV) .cache .pytest_cache .ruff_cache .mypy_cache .hypothesis *.egg-info
	find . -path ./.git -prune -o -type d -name __pycache__ -exec rm -rf {} +
