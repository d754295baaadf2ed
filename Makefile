# Two commands do all setup on a fresh machine: `make demo` and `make test`.
SHELL := /bin/bash
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
TORCH_SPEC ?= torch==2.13.0
STAMP := $(VENV)/.qwidgets-installed

.PHONY: setup test test-quick lint demo bench clean browser-deps screenshots

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --upgrade pip

# The CPU build of torch goes in first, so that the open range in pyproject.toml
# is already satisfied and never pulls a multi-GB CUDA build.
$(STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install "$(TORCH_SPEC)"
	$(PY) -m pip install -e '.[dev]'
	touch $(STAMP)

setup: $(STAMP)

browser-deps:
	@bash .ci/browser-deps

lint: setup
	$(VENV)/bin/ruff check .

test: setup browser-deps
	$(VENV)/bin/ruff check .
	$(PY) -m pytest -q

# Without the slow (fresh kernels and interpreters) and browser tests: a quick check while editing.
test-quick: setup
	$(PY) -m pytest -q -m "not slow and not browser"

# Refresh the README screenshots in docs/ from the browser test (the test itself never writes
# into the repository: its screenshots go to a temporary folder, here build/screenshots).
screenshots: setup browser-deps
	rm -rf build/screenshots
	QWIDGETS_SCREENSHOT_DIR=build/screenshots $(PY) -m pytest -q -p no:cacheprovider tests/test_browser.py
	cp build/screenshots/explorer.png build/screenshots/planner.png docs/

# JupyterLab on notebooks/demo.ipynb (127.0.0.1, URL printed); with HEADLESS=1 or CI set,
# execute the notebook and write build/demo.html instead.
demo: setup
	@VENV=$(VENV) bash .ci/demo

bench: setup
	for b in core probe explorer scan scale planning refine; do $(PY) benchmarks/bench_$$b.py || exit 1; done

clean:
	rm -rf build .pytest_cache
