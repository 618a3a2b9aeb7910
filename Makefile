# ranktide developer commands. Each target creates .venv when it is missing.
PY      ?= python3
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.installed

.PHONY: demo test lint bench clean browser browser-if-root

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip
	$(BIN)/python -m pip install -q -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/ranktide demo --out demo-out

# A fresh numba cache per test run: numba keys its cache on the defining file only.
test: $(STAMP) browser-if-root
	rm -rf .numba_cache && NUMBA_CACHE_DIR=$(CURDIR)/.numba_cache $(BIN)/python -m pytest -x -rs tests
	$(BIN)/ruff check stream kernels tests tools

# Headless Chromium for the report's browser test (tests/diagnostics/test_report.py), which
# skips with a reason without it. `test` installs it only as root on a system with apt-get
# (CI): apt-get update + install took 1-2 minutes here, well inside CI's time; a failed
# install is reported and the test then skips, so it never fails the build. Elsewhere
# `make browser` (as root) installs it.
browser:
	test -x /usr/bin/chromium || (apt-get update && apt-get install -y chromium chromium-driver)

browser-if-root:
	@if [ ! -x /usr/bin/chromium ] && [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null; then \
	  (apt-get update -qq && apt-get install -y -qq chromium chromium-driver >/dev/null) || \
	  echo "chromium could not be installed; the report's browser test will skip"; fi

lint: $(STAMP)
	$(BIN)/ruff check stream kernels tests tools

bench: $(STAMP)
	mkdir -p bench-out
	for b in tools/bench_*.py; do $(BIN)/python $$b --out bench-out || exit 1; done

clean:
	rm -rf $(VENV) .numba_cache demo-out bench-out
