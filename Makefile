# plumbwatch: the two set-up commands are `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
RUN_STAMP := $(VENV)/.installed-run
PYTEST_ARGS ?=
DEMO_ARGS ?=

.PHONY: help venv test test-fast lint typecheck bench demo clean browser

help:
	@echo "make demo       replay the courier demo into a fresh ./var/demo.db and serve it (Ctrl-C stops)"
	@echo "make test       lint, type-check and run the whole suite (SQLite and PostgreSQL)"
	@echo "make test-fast  the tests without the slow ones, stopping at the first failure"
	@echo "make bench      run the benchmarks under tests/benchmarks/ (a report, not a test)"
	@echo "make browser    install Debian's chromium for the browser test (needs root)"

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[dev]"
	touch $(STAMP) $(RUN_STAMP)

# The demo needs the service, not the test tools: a shorter first install.
$(RUN_STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e .
	touch $(RUN_STAMP)

venv: $(STAMP)

lint: $(STAMP)
	$(BIN)/ruff check service tests migrations demo_feed
	$(BIN)/ruff format --check service tests migrations demo_feed

typecheck: $(STAMP)
	$(BIN)/mypy

# Debian's Chromium for the browser tests (playwright drives it; it never downloads one).
browser:
	@if [ -x /usr/bin/chromium ]; then :; \
	elif [ "$$(id -u)" = "0" ]; then \
		apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium; \
	else echo "chromium is missing: 'sudo apt-get install chromium' (the browser test skips without it)"; fi

test: lint typecheck browser
	$(BIN)/pytest --timeout=600 $(PYTEST_ARGS)

test-fast: $(STAMP)
	$(BIN)/pytest -x -q -m "not slow" $(PYTEST_ARGS)

bench: $(STAMP)
	$(BIN)/python tests/benchmarks/bench_stats.py
	$(BIN)/python tests/benchmarks/bench_ingest.py
	$(BIN)/python tests/benchmarks/bench_evaluate.py --engine sqlite
	$(BIN)/python tests/benchmarks/bench_evidence.py
	$(BIN)/python tests/benchmarks/bench_pages.py --engine sqlite

# Each run replays a fresh history ending today, so it starts from an empty demo file.
demo: $(RUN_STAMP)
	mkdir -p var
	rm -f var/demo.db var/demo.db-wal var/demo.db-shm
	PLUMBWATCH_DATABASE_URL=$${PLUMBWATCH_DATABASE_URL:-sqlite:///./var/demo.db} $(BIN)/plumbwatch demo $(DEMO_ARGS)

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache .hypothesis
