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

# Every benchmark in benchmarks/, each writing out/NAME.json. The shared data sets live in
# $(DATA) (../shared/data unless CASCADE_SHARED_DATA says otherwise); a benchmark, or a data
# set of one, whose data is not there is skipped with a message. Order: the quick ones
# first; batch (the nightly job at scale; trains the demo bundle itself, about 9 minutes,
# no shared data) after them; page_model before budget (it saves the per-split arrays
# budget reads); the hyper-parameter sweep, the slowest and only for
# docs/url-model-sweep.md, last.
DATA       ?= $(if $(CASCADE_SHARED_DATA),$(CASCADE_SHARED_DATA),../shared/data)
BENCH       = CASCADE_SHARED_DATA=$(abspath $(DATA)) $(BIN)/python
URL_DATA    = open-directory-hosts domain-categories

bench: $(VENV)/.installed-bench
	mkdir -p out
	$(BENCH) benchmarks/fetch.py --json out/fetch.json
	$(BENCH) benchmarks/fetch.py --mode mixed --json out/fetch-mixed.json
	$(BENCH) benchmarks/service.py --json out/service.json
	$(BENCH) benchmarks/batch.py --json out/batch.json
	@sets=""; for d in $(URL_DATA); do \
	  if [ -d "$(DATA)/$$d" ]; then sets="$$sets$$d,"; \
	  else echo "url_model: skipping $$d ($(DATA)/$$d not found)"; fi; \
	done; \
	set -x; $(BENCH) benchmarks/url_model.py --datasets "$${sets}demo-scenario" \
	  --json out/url_model.json
	$(BENCH) benchmarks/extract.py --json out/extract.json
	rm -f out/arrays/*.npz
	$(BENCH) benchmarks/page_model.py --arrays out/arrays --json out/page_model.json
	@if ls out/arrays/*.npz >/dev/null 2>&1; then \
	  set -x; $(BENCH) benchmarks/budget.py --arrays out/arrays --json out/budget.json; \
	else echo "budget: skipped (page_model saved no arrays under out/arrays)"; fi
	$(BENCH) benchmarks/report_screenshot.py --png out/report_screenshot.png \
	  --json out/report_screenshot.json
	@sets=""; for d in $(URL_DATA); do \
	  if [ -d "$(DATA)/$$d" ]; then sets="$$sets$$d,"; \
	  else echo "sweep_url_model: skipping $$d ($(DATA)/$$d not found)"; fi; \
	done; \
	if [ -n "$$sets" ]; then \
	  set -x; $(BENCH) benchmarks/sweep_url_model.py --datasets "$${sets%,}" \
	    --json out/sweep_url_model.json; \
	else echo "sweep_url_model: skipped (no URL data under $(DATA))"; fi

clean:
	rm -rf $(VENV) demo-output out .pytest_cache .ruff_cache .hypothesis
