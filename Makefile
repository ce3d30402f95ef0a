# One command each on a fresh machine: the virtualenv is created and filled on first use.
VENV ?= .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed-stamp

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	test -x $(PY) || python3 -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/evenhand demo

lint: $(STAMP)
	$(VENV)/bin/ruff check service tests benchmarks scripts
	$(VENV)/bin/ruff format --check service tests benchmarks scripts
	$(VENV)/bin/mypy

test: lint
	$(VENV)/bin/pytest -q

bench: $(STAMP)
	$(PY) benchmarks/run_all.py

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .mypy_cache .ruff_cache demo-output
