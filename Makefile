# cardiosieve: `make demo` runs the nightly job on the bundled sample lake; `make test` runs the tests.
SHELL := /bin/bash
.SHELLFLAGS := -o pipefail -c
PYTHON ?= $(shell command -v python3.11 || command -v python3)
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEMO_OUT ?= out/demo

.PHONY: install demo test test-py312 bench clean sample-lake

install: $(STAMP)

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip 2>&1 | { grep -v "^WARNING: Location" || true; }
	$(BIN)/python -m pip install --quiet -c constraints.txt -e '.[test,scheduler,spark]' 2>&1 | { grep -v "^WARNING: Location" || true; }
	$(BIN)/python -c "import pandas, pyarrow, scipy, sqlalchemy, pytest, duckdb"
	touch $(STAMP)

demo: install
	$(BIN)/cardiosieve run --lake sample_lake --config sample_lake/site.toml --out $(DEMO_OUT) \
		--start 2026-11-29T00:00:00Z --end 2026-11-30T00:00:00Z
	@if $(BIN)/cardiosieve --help | grep -q " show "; then \
		$(BIN)/cardiosieve show --out $(DEMO_OUT) --config sample_lake/site.toml --limit 8; fi
	@echo "review page: $(BIN)/cardiosieve serve --out $(DEMO_OUT) --config sample_lake/site.toml --lake sample_lake"

test: install
	$(BIN)/python -m pytest

# The same suite under Python 3.12 in its own venv, where Python 3.12 is installed (CI runs
# 3.11); name the interpreter with PY312=/path/to/python3.12 when it is not on PATH.
PY312 ?= python3.12
test-py312:
	test -x .venv312/bin/python || $(PY312) -m venv .venv312
	.venv312/bin/python -m pip install --quiet --upgrade pip 2>&1 | { grep -v "^WARNING: Location" || true; }
	.venv312/bin/python -m pip install --quiet -c constraints.txt -e '.[test,scheduler,spark]' 2>&1 | { grep -v "^WARNING: Location" || true; }
	.venv312/bin/python -m pytest

bench: install
	$(BIN)/python bench/align.py
	$(BIN)/python bench/rerank.py
	$(BIN)/python bench/worklist.py
	$(BIN)/python bench/nightly.py

sample-lake: install
	$(BIN)/python -m cardiosieve.pipeline.samplegen --out sample_lake

clean:
	rm -rf out .pytest_cache
