# Two commands do all the set-up: `make up` runs mixscore, `make test` runs the tests.
# Both create .venv on first use and install from the locks in deploy/locks/ (exact
# versions with their hashes, made from pyproject.toml's ranges by `make lock`): `up`
# what running needs (the project and the embedded Redis), `test` adds the test tools.

PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
PIP := $(BIN)/pip install --quiet --disable-pip-version-check
LOCKS := deploy/locks
RUNNING := $(VENV)/.installed-run
TESTING := $(VENV)/.installed-test
# The locks are made for CPython 3.11 on Linux, the Python CI runs; the project itself
# goes in editable, built by the locked setuptools without fetching anything else.
COMPILE := CUSTOM_COMPILE_COMMAND="make lock" $(BIN)/pip-compile --quiet --generate-hashes \
	--allow-unsafe --build-deps-for editable --strip-extras --no-emit-index-url \
	--no-emit-find-links pyproject.toml

.PHONY: test up lock lock-upgrade bench bench-http bench-loop bench-jobs bench-sources \
	bench-replicas clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(RUNNING): $(LOCKS)/run.txt | $(BIN)/python
	$(PIP) --require-hashes --no-deps -r $(LOCKS)/run.txt
	$(PIP) --no-deps --no-build-isolation -e .
	touch $@

# The test lock is a superset of the run lock (same versions), so it stands for both.
$(TESTING): $(LOCKS)/test.txt | $(BIN)/python
	$(PIP) --require-hashes --no-deps -r $(LOCKS)/test.txt
	$(PIP) --no-deps --no-build-isolation -e .
	touch $@ $(RUNNING)

## make test: lint, type-check and run the whole test suite
test: $(TESTING)
	$(BIN)/ruff check .
	$(BIN)/mypy
	$(BIN)/pytest

## make up: embedded redis-server + fit worker + API on 127.0.0.1:8000 (Ctrl-C stops all)
up: $(RUNNING)
	$(BIN)/mixscore up

## make lock: pin what pyproject.toml's ranges allow, keeping every pin still allowed
lock: $(TESTING)
	$(COMPILE) --extra test --extra embedded --output-file $(LOCKS)/test.txt
	$(COMPILE) --extra embedded --constraint $(LOCKS)/test.txt --output-file $(LOCKS)/run.txt

## make lock-upgrade: the newest releases within the ranges, then the whole suite on them
lock-upgrade: $(TESTING)
	$(COMPILE) --upgrade --extra test --extra embedded --output-file $(LOCKS)/test.txt
	$(COMPILE) --upgrade --extra embedded --constraint $(LOCKS)/test.txt \
		--output-file $(LOCKS)/run.txt
	$(MAKE) test

## make bench: the numerical core against its floors (prints ratios; exit 1 on a missed goal)
bench: $(RUNNING)
	$(BIN)/python loadtests/bench_core.py

## make bench-http: HTTP throughput against /healthz and the core (needs Debian's wrk)
bench-http: $(RUNNING)
	$(BIN)/python loadtests/bench_http.py

## make bench-loop: /healthz p99 and peak RSS of an API process under heavy requests
bench-loop: $(RUNNING)
	$(BIN)/python loadtests/bench_loop.py

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
