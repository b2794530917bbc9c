# Two entry points: `make demo` and `make test`. Both create .venv on first use.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed-stamp
# Brian2's compile cache and scratch files stay inside the checkout.
export CYTHON_CACHE_DIR := $(CURDIR)/.cache/cython
export PROTOLANG_STANDALONE_CACHE := $(CURDIR)/.cache/standalone
export OMP_NUM_THREADS := 1

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip setuptools wheel
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/protolang run demo/pyramid_pair_train.protocol --out runs/demo --force

test: $(STAMP)
	$(PY) -m pytest -q tests

bench: $(STAMP)
	$(PY) bench/paired_train.py
	$(PY) bench/characterise.py
	$(PY) bench/embedded_network.py
	$(PY) bench/batch_library.py
	$(PY) bench/scan_standalone.py

clean:
	rm -rf $(VENV) .cache runs
