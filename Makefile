# Two entry points: `make demo` (installs, generates data, runs the pipeline) and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
PIP := $(PY) -m pip --disable-pip-version-check -q

.PHONY: demo test lint clean

$(VENV)/.installed: pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PIP) install -e . 2>&1 | grep -v "is ignored: it is neither" || true
	$(PY) -c "import eigenstream, numpy, scipy, dask.distributed, zarr, pynndescent, sklearn"
	touch $@

$(VENV)/.test-installed: $(VENV)/.installed
	$(PIP) install -e ".[test]" 2>&1 | grep -v "is ignored: it is neither" || true
	$(PY) -c "import pytest, hypothesis"
	touch $@

demo: $(VENV)/.installed
	$(VENV)/bin/eigenstream demo

test: $(VENV)/.test-installed
	$(VENV)/bin/ruff check .
	$(PY) -m pytest

clean:
	rm -rf $(VENV) demo-work
