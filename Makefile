# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test bench sysdeps wheel-check clean help

help:
	@echo "make demo   - set up .venv, analyse the built-in synthetic scene, write demo-output/report.html"
	@echo "make test   - set up .venv (and, as root, the system packages for headless napari), run all tests"
	@echo "make bench  - run the benchmarks (ratios against a reference run in the same process);"
	@echo "              BENCH_ARGS='--only kernel', '--sizes 512,1024', '--only cluster', '--update-readme' ..."
	@echo "              BENCH_SKIP_32768=1 leaves out the 32768^2 store (today it is stopped at the memory limit; hours if it were not)"
	@echo "make wheel-check - build the wheel, install it in a clean venv away from the sources, run it"

CONSTRAINTS := constraints.txt

$(STAMP): pyproject.toml $(CONSTRAINTS)
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -c $(CONSTRAINTS) -e ".[test,napari]"
	touch $(STAMP)

# System packages for a virtual display (napari tests) and a headless browser (the report test), Debian;
# installed only when missing and when we are root.
sysdeps:
	@if ! command -v xvfb-run >/dev/null 2>&1 || ! command -v chromium >/dev/null 2>&1; then \
		if [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
			apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq \
				xvfb xauth libxcb-icccm4 libxcb-keysyms1 chromium >/dev/null; \
		else \
			echo "note: xvfb-run or chromium is missing and we are not root: GUI tests will be skipped and the report's browser test fails (CI installs both)"; \
		fi; \
	fi

demo: $(STAMP)
	$(VENV)/bin/domains demo --out demo-output --overwrite

test: $(STAMP) sysdeps
	$(MAKE) --no-print-directory _pytest

_pytest:
	$(if $(shell command -v xvfb-run 2>/dev/null),xvfb-run -a -s "-screen 0 1280x1024x24",) $(PY) -m pytest

# Writes bench-output/bench.md and prints it; see `$(PY) benchmarks/run.py --help` for BENCH_ARGS.
# BENCH_SKIP_32768=1 in the environment leaves the 32768^2 store (4 GiB; today it is stopped at the memory limit, and would take hours) out.
BENCH_ARGS ?=
bench: $(STAMP)
	$(PY) benchmarks/run.py $(BENCH_ARGS)

# The wheel a user gets: built from the sources, installed into a fresh venv in a folder outside the
# source tree (so nothing is imported from here), then `domains --version` and `domains demo` run there.
wheel-check:
	@set -e; work=$$(mktemp -d); trap 'rm -rf "$$work"' EXIT; \
	$(PYTHON) -m pip wheel --quiet --no-deps --wheel-dir "$$work/dist" . ; \
	$(PYTHON) -c "import sys, zipfile; names = zipfile.ZipFile(sys.argv[1]).namelist(); \
	need = ['domains/synth/__init__.py', 'napari_plugin/_qt/__init__.py', 'napari_plugin/napari.yaml']; \
	missing = [n for n in need if n not in names]; print(len(names), 'files in the wheel'); \
	sys.exit('missing from the wheel: ' + ', '.join(missing) if missing else 0)" "$$work"/dist/*.whl; \
	$(PYTHON) -m venv "$$work/venv"; \
	"$$work/venv/bin/python" -m pip install --quiet -c $(CURDIR)/$(CONSTRAINTS) "$$work"/dist/*.whl; \
	cd "$$work"; \
	venv/bin/python -c "import domains, sys; sys.exit(0 if '/site-packages/' in domains.__file__ else 'imported from ' + domains.__file__)"; \
	venv/bin/domains --version; \
	venv/bin/domains demo --out "$$work/demo" > "$$work/demo.log"; \
	test -s "$$work/demo/report.html" && test -s "$$work/demo/summary.json" && test -d "$$work/demo/maps.zarr"; \
	echo "wheel-check: the installed wheel ran the demo: $$(cat "$$work/demo.log")"

clean:
	rm -rf $(VENV) demo-output bench-output .pytest_cache
