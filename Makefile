# Two entry points do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test test-fast test-browser browser-deps bench docs clean

$(STAMP): pyproject.toml constraints.txt
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	# torch first, pinned to the CPU build (constraints.txt), so nothing pulls a CUDA build.
	$(PY) -m pip install --quiet -c constraints.txt torch
	$(PY) -m pip install --quiet -c constraints.txt -e '.[dev]'
	touch $(STAMP)

# Debian's Chromium for the one real-browser test (Playwright's own browser download does not work here).
browser-deps:
	@command -v chromium >/dev/null 2>&1 || { \
	  echo "installing Debian chromium for the browser test"; \
	  SUDO=$$( [ "$$(id -u)" = 0 ] || echo sudo ); \
	  $$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq chromium >/dev/null; }

demo: $(STAMP)
	$(VENV)/bin/nbkit demo --out demo-out

test: $(STAMP) browser-deps
	$(PY) -m pytest

test-fast: $(STAMP)
	$(PY) -m pytest -m "not slow and not browser"

test-browser: $(STAMP) browser-deps
	$(PY) -m pytest -m browser

bench: $(STAMP)
	$(PY) benchmarks/record_overhead.py
	$(PY) benchmarks/explorer_latency.py
	$(PY) benchmarks/replay_speed.py
	$(PY) benchmarks/analysis_cost.py
	$(PY) benchmarks/profile_cost.py
	$(PY) benchmarks/step_quality_cost.py

# The README's pictures, rendered by the views themselves from the demo scenario.
docs: $(STAMP)
	$(PY) docs/render_pictures.py

clean:
	rm -rf $(VENV) demo-out .pytest_cache
