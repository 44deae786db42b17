# Every target builds its own environment from nothing with python3 -m venv.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test test-long bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test,evidence]'
	touch $(STAMP)

demo: $(STAMP)
	$(PY) -m invert.demo

test: $(STAMP)
	$(PY) -m pytest -q

test-long: $(STAMP)
	$(PY) -m pytest -q -m slow

bench: $(STAMP)
	$(PY) benchmarks/run_all.py

clean:
	rm -rf $(VENV) build *.egg-info
