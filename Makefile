# Two commands do all setup on a fresh machine: `make demo` and `make test`.
SHELL := /bin/bash
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
TORCH_SPEC ?= torch==2.13.0
STAMP := $(VENV)/.qwidgets-installed

.PHONY: setup test test-kernels test-quick lint demo bench clean browser-deps screenshots

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

# The numerics tests once more with the kernels and thread count another CPU would use (plain
# ATen kernels, oneDNN and MKL held to AVX2, one thread): a test that compares float32 results
# computed under other shapes or splits must hold within float32 rounding on any CPU, and the
# demo's README figures must be what any CPU prints.
OTHER_KERNELS := ATEN_CPU_CAPABILITY=default ONEDNN_MAX_CPU_ISA=AVX2 MKL_CBWR=AVX2 OMP_NUM_THREADS=1
NUMERICS_TESTS := tests/test_sources.py tests/test_checks.py tests/test_scan.py tests/test_scan_scale.py \
	tests/test_separate.py tests/test_plan.py tests/test_quantize.py tests/test_ranges.py \
	tests/test_metrics.py tests/test_refine.py tests/test_budget.py tests/test_demo.py

test: setup browser-deps
	$(VENV)/bin/ruff check .
	$(PY) -m pytest -q
	env $(OTHER_KERNELS) $(PY) -m pytest -q -p no:cacheprovider -m "not browser" $(NUMERICS_TESTS)

# Only the second, other-kernels run above.
test-kernels: setup
	env $(OTHER_KERNELS) $(PY) -m pytest -q -p no:cacheprovider -m "not browser" $(NUMERICS_TESTS)

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
