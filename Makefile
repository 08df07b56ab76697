# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test bench sysdeps clean help

help:
	@echo "make demo   - set up .venv, analyse the built-in synthetic scene, write demo-output/report.html"
	@echo "make test   - set up .venv (and, as root, the system packages for headless napari), run all tests"
	@echo "make bench  - run the benchmarks (ratios against a reference run in the same process)"

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[test,napari]"
	touch $(STAMP)

# System packages for a virtual display (Debian); installed only when missing and when we are root.
sysdeps:
	@if ! command -v xvfb-run >/dev/null 2>&1; then \
		if [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
			apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq \
				xvfb xauth libxcb-icccm4 libxcb-keysyms1 >/dev/null; \
		else \
			echo "note: xvfb-run is missing and we are not root: GUI tests will be skipped (CI fails on that)"; \
		fi; \
	fi

demo: $(STAMP)
	$(VENV)/bin/domains demo --out demo-output --overwrite

test: $(STAMP) sysdeps
	$(MAKE) --no-print-directory _pytest

_pytest:
	$(if $(shell command -v xvfb-run 2>/dev/null),xvfb-run -a -s "-screen 0 1280x1024x24",) $(PY) -m pytest

bench: $(STAMP)
	$(PY) benchmarks/run.py

clean:
	rm -rf $(VENV) demo-output bench-output .pytest_cache
