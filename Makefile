# elmon: every target bootstraps its own virtual environment in .venv from nothing.
PY      ?= python3
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.installed-stamp
PYTEST_ARGS ?=

.PHONY: demo test bench install clean browser-deps

$(BIN)/python:
	@echo "==> creating virtual environment in $(VENV)"
	$(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	@echo "==> installing elmon with its test extras into $(VENV) (pip install -e '.[test]')"
	$(BIN)/python -m pip install --quiet -e '.[test]'
	@touch $(STAMP)

install: $(STAMP)
	@echo "==> environment ready"

# Debian's chromium for the real-browser dashboard test (never a browser download step).
browser-deps:
	@if [ -x /usr/bin/chromium ]; then echo "==> chromium present: $$(/usr/bin/chromium --version 2>/dev/null)"; \
	else echo "==> installing Debian's chromium for the browser test"; \
	  (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null) \
	  || echo "==> WARNING: chromium could not be installed; the browser test will fail and say so"; fi

# dashboard port of the demo: make demo PORT=8600 (a port in use is replaced by a free one)
PORT ?= 8501

demo: install
	@echo "==> running the elmon demo"
	$(BIN)/elmon demo --port $(PORT)

test: install browser-deps
	@echo "==> running the test suite"
	$(BIN)/python -m pytest -n 2 $(PYTEST_ARGS)

bench: install
	@echo "==> running benchmarks (writes benchmarks/RESULTS.md)"
	$(BIN)/python -m benchmarks.run

clean:
	rm -rf $(VENV) .pytest_cache build *.egg-info
