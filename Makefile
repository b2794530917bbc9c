# Two entry points: `make demo` and `make test`. Both create .venv on first use.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed-stamp
# Brian2's compile cache and scratch files stay inside the checkout.
export CYTHON_CACHE_DIR := $(CURDIR)/.cache/cython
export PROTOLANG_STANDALONE_CACHE := $(CURDIR)/.cache/standalone
export OMP_NUM_THREADS := 1

.PHONY: demo test bench clean browser

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip setuptools wheel
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/protolang run demo/pyramid_pair_train.protocol --out runs/demo --force
	$(VENV)/bin/protolang report runs/demo
	$(VENV)/bin/protolang sheet demo/pyramid_pair_train.protocol --out runs/demo_sheet --run runs/demo --force

test: $(STAMP) browser
	$(PY) -m pytest -q tests

# Headless Chromium opens the HTML run report in tests/test_run_report.py: install it once if missing
# (apt-get as root, else through sudo; says what to do when neither works).
CHROMIUM := /usr/bin/chromium

browser:
	@if [ -x "$(CHROMIUM)" ]; then exit 0; fi; \
	if [ "$$(id -u)" -eq 0 ]; then SUDO=""; \
	elif command -v sudo >/dev/null 2>&1; then SUDO="sudo"; \
	else echo "make browser: $(CHROMIUM) is missing and this user can neither install packages nor use sudo;" \
	          "ask an administrator to run 'apt-get install -y chromium', then run make test again" >&2; exit 1; fi; \
	echo "make browser: installing chromium (tests/test_run_report.py renders the HTML report with it)"; \
	$$SUDO env DEBIAN_FRONTEND=noninteractive apt-get install -y chromium \
	  || { $$SUDO apt-get update && $$SUDO env DEBIAN_FRONTEND=noninteractive apt-get install -y chromium; } \
	  || { echo "make browser: could not install chromium; install it by hand ('apt-get install -y chromium')" \
	            "and run make test again" >&2; exit 1; }; \
	[ -x "$(CHROMIUM)" ] || { echo "make browser: chromium was installed but $(CHROMIUM) is missing" >&2; exit 1; }

bench: $(STAMP)
	$(PY) bench/paired_train.py
	$(PY) bench/characterise.py
	$(PY) bench/embedded_network.py
	$(PY) bench/batch_library.py
	$(PY) bench/scan_standalone.py

clean:
	rm -rf $(VENV) .cache runs
