# prescreen: the two commands a fresh machine needs are `make demo` and `make test`.
# Each builds .venv from nothing (and the system packages the DFT labeller needs), then runs.

PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
PIP    := $(PY) -m pip
CONSTRAINTS := constraints.txt
DEMO_DIR ?= demo_out

.PHONY: demo test test-fast venv dft-env browser-env system-deps benchmarks dataset model constraints clean help

help:
	@echo "make demo   - set up and run the main job on the shipped data"
	@echo "make test   - set up and run the whole test suite (DFT tests included)"
	@echo "make test-fast - unit tests only (no DFT)"

$(VENV)/.core-installed: pyproject.toml $(CONSTRAINTS)
	bash scripts/install_system_deps.sh
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PIP) install -q --upgrade "pip>=24"
	$(PIP) install -q -c $(CONSTRAINTS) -e ".[test]"
	touch $@

venv: $(VENV)/.core-installed

# System packages: the DFT labeller (GPAW) builds against libxc, FFTW, BLAS and LAPACK.
system-deps:
	bash scripts/install_system_deps.sh

# GPAW (the `dft` extra), built from PyPI against the system libraries above.
dft-env: venv system-deps
	bash scripts/install_gpaw.sh $(VENV)

# Headless Chromium (Debian) for the report's browser check.
browser-env:
	bash scripts/install_browser.sh

demo: venv
	$(PY) -m prescreen.demo --out $(DEMO_DIR)

test: venv dft-env browser-env
	$(PY) -m pytest

test-fast: venv
	$(PY) -m pytest -m "not dft"

benchmarks: venv
	for b in benchmarks/*.py; do echo "== $$b"; $(PY) $$b || exit 1; done

# Regenerate the open dataset (resumes from data_work/; hours of CPU) and the default model.
dataset: dft-env
	OPENBLAS_NUM_THREADS=1 $(PY) scripts/build_open_dataset.py --workers 1

model: venv
	$(PY) scripts/train_default_model.py

constraints:
	$(PIP) freeze --exclude-editable | grep -v '^-e' > $(CONSTRAINTS)

clean:
	rm -rf $(VENV) $(DEMO_DIR) .pytest_cache
