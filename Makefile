# One command from a fresh clone: `make test` (creates .venv, installs, runs pytest).
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python

.PHONY: demo test lint bench clean

$(VENV)/.installed: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $@

demo: $(VENV)/.installed
	$(VENV)/bin/streamdet demo --out demo-out

test: $(VENV)/.installed
	@$(PY) -m pytest -q; rc=$$?; \
	if [ $$rc -eq 5 ]; then echo "pytest collected no tests: failing on purpose"; exit 1; fi; \
	exit $$rc

lint: $(VENV)/.installed
	$(VENV)/bin/ruff check streamdet tests benchmarks

bench: $(VENV)/.installed
	$(PY) benchmarks/engine_throughput.py
	$(PY) benchmarks/daemon_throughput.py

clean:
	rm -rf $(VENV) .pytest_cache demo-out
