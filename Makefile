# ranktide developer commands. Each target creates .venv when it is missing.
PY      ?= python3
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip
	$(BIN)/python -m pip install -q -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/ranktide demo --out demo-out

# A fresh numba cache per test run: numba keys its cache on the defining file only.
test: $(STAMP)
	rm -rf .numba_cache && NUMBA_CACHE_DIR=$(CURDIR)/.numba_cache $(BIN)/python -m pytest -x -q tests
	$(BIN)/ruff check stream kernels tests tools

lint: $(STAMP)
	$(BIN)/ruff check stream kernels tests tools

bench: $(STAMP)
	mkdir -p bench-out
	for b in tools/bench_*.py; do $(BIN)/python $$b --out bench-out || exit 1; done

clean:
	rm -rf $(VENV) .numba_cache demo-out bench-out
