# Two commands do all the set-up: `make demo` and `make test`. Both build .venv first.
PYTHON ?= $(shell command -v python3.11 || command -v python3)
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed
export NUMBA_CACHE_DIR ?= $(CURDIR)/.venv/numba-cache
PYTEST_ARGS ?=

.PHONY: demo test test-all bench venv clean

venv: $(STAMP)

$(STAMP): pyproject.toml
	@test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[dev]"
	@touch $(STAMP)

demo: $(STAMP)
	$(PY) -m cliquewise.demo

test: $(STAMP)
	$(PY) -m pytest -q $(PYTEST_ARGS)

bench: $(STAMP)
	@for b in benchmarks/*.py; do echo "== $$b"; $(PY) $$b || exit 1; done

clean:
	rm -rf demo-run demo-data .pytest_cache
