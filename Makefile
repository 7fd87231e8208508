# Two commands set up everything: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean browser

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/planetmix demo --out demo_output

test: $(STAMP) browser
	$(BIN)/python -m pytest -q

# Headless Chromium for the report checks (tests/inversion/test_browser.py). Optional:
# installed from the Debian package only when missing and when running as root; the
# browser tests skip, saying why, where it cannot be installed. PLANETMIX_NO_BROWSER=1
# skips the installation.
browser:
	@command -v chromium >/dev/null 2>&1 || [ -n "$$PLANETMIX_NO_BROWSER" ] \
	  || [ "$$(id -u)" != 0 ] || ! command -v apt-get >/dev/null 2>&1 \
	  || timeout 600 apt-get install -y --no-install-recommends chromium >/dev/null 2>&1 \
	  || echo "chromium not installed: the browser tests will be skipped"

lint: $(STAMP)
	$(BIN)/ruff check .

bench: $(STAMP)
	$(BIN)/python benchmarks/run_all.py

clean:
	rm -rf $(VENV) demo_output .pytest_cache
