# Two entry points, both from a fresh clone: `make demo` (the whole job on embedded
# defaults) and `make test` (the test suite). Each builds its own virtual environment
# from pyproject.toml, so nothing installed by hand is needed.
PYTHON ?= python3
VENV   ?= .venv
BIN     = $(VENV)/bin

.PHONY: demo test lint bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@

$(VENV)/.installed-bench: pyproject.toml | $(VENV)/.installed
	$(BIN)/python -m pip install --quiet -e '.[test,bench]'
	touch $@

demo: $(VENV)/.installed
	$(BIN)/cascade demo --out demo-output

test: $(VENV)/.installed
	$(BIN)/ruff check cascade tests benchmarks
	$(BIN)/python -m pytest

bench: $(VENV)/.installed-bench
	mkdir -p out
	$(BIN)/python benchmarks/url_model.py --json out/url_model.json
	$(BIN)/python benchmarks/fetch.py --json out/fetch.json

clean:
	rm -rf $(VENV) demo-output out .pytest_cache .ruff_cache .hypothesis
