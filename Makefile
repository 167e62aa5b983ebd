# prescreen: the two commands a fresh machine needs are `make demo` and `make test`.
# Each builds .venv from nothing (and the system packages the DFT labeller needs), then runs.

PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
PIP    := $(PY) -m pip
CONSTRAINTS := constraints.txt
DEMO_DIR ?= demo_out

.PHONY: demo test test-fast venv dft-env dataset-env browser-env system-deps benchmarks benchmarks-dft benchmarks-uip dataset model constraints clean help

help:
	@echo "make demo   - set up and run the main job on the shipped data"
	@echo "make test   - set up and run the whole test suite (DFT tests included)"
	@echo "make test-fast - everything but the DFT tests"
	@echo "make benchmarks / benchmarks-dft / benchmarks-uip - print the measured figures"
	@echo "make dataset - extend data_open/ with DFT labels (hours; resumes; installs GPAW, CHGNet, PyTorch)"
	@echo "make model  - retrain the shipped default model on data_open/"
	@echo "make venv / dft-env / dataset-env - set up only (core; + GPAW; + GPAW and CHGNet)"
	@echo "make system-deps / browser-env - the Debian packages / headless Chromium (apt-get)"
	@echo "make constraints - write constraints.txt from the versions installed in .venv"
	@echo "make clean  - remove .venv, the demo output and pytest's cache"

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

# The dataset build relaxes with a universal potential (and starts its DFT relaxations
# from the potential's geometry): GPAW plus
# CHGNet and PyTorch (the `uip` extra; about 1 GB where pip finds a CPU build of torch
# 2.13.0, several GB for PyPI's default build).
dataset-env: dft-env
	$(PIP) install -q -c $(CONSTRAINTS) -e '.[uip]'

# Headless Chromium (Debian) for the report's browser check.
browser-env:
	bash scripts/install_browser.sh

demo: venv
	$(PY) -m prescreen.demo --out $(DEMO_DIR)

test: venv dft-env browser-env
	$(PY) -m pytest

test-fast: venv
	$(PY) -m pytest -m "not dft"

BENCH_OUT ?= benchmarks/out
# The benchmarks without DFT; plots land in $(BENCH_OUT). The replay runs the three
# strategies of docs/replay.md in rounds of about 20 evaluations (15 minutes on 1,446
# labels; all ten strategies in rounds of 5 would take hours); it says "NOT RUN" (exit 2)
# until data_open/ has enough labels; any other failure stops make.
benchmarks: venv
	mkdir -p $(BENCH_OUT)
	for b in ingest featurise store model learning_curve order_cost; do echo "== $$b"; $(PY) benchmarks/$$b.py || exit 1; done
	$(PY) benchmarks/phase_diagram.py $(BENCH_OUT)/phase_diagram.png
	$(PY) benchmarks/replay.py $(BENCH_OUT)/replay.png --batch-runs 20 \
		--only greedy_probability expected_hits_per_core_hour random_selection || [ $$? -eq 2 ]

# The DFT benchmarks (about an hour): labelling, the dataset's plane-wave relaxation
# against published lattices, and Z2 cost. (benchmarks/relax.py measures the earlier
# LCAO relaxation and runs on its own.)
benchmarks-dft: dft-env
	OPENBLAS_NUM_THREADS=1 $(PY) benchmarks/label.py --workers 2
	OPENBLAS_NUM_THREADS=1 $(PY) benchmarks/relax_pw.py
	OPENBLAS_NUM_THREADS=1 $(PY) benchmarks/z2.py

# A universal potential against the DFT relaxation (installs CHGNet and PyTorch, see
# dataset-env).
benchmarks-uip: venv
	$(PIP) install -q -c $(CONSTRAINTS) -e '.[uip]'
	$(PY) benchmarks/relax_uip.py

# Regenerate the open dataset (resumes from data_work/; hours of CPU); `make model` then
# retrains the default model on it. DATASET_ARGS="--relax-with plane-waves" relaxes with
# DFT what the default relaxed with the potential alone.
# DATASET_ARGS="--fallback later" leaves the potential's refusals for a later run.
DATASET_ARGS ?=
DATASET_WORKERS ?= 2
dataset: dataset-env
	OPENBLAS_NUM_THREADS=1 $(PY) scripts/build_open_dataset.py --workers $(DATASET_WORKERS) $(DATASET_ARGS)

model: venv
	$(PY) scripts/train_default_model.py

constraints:
	$(PIP) freeze --exclude-editable | grep -v '^-e' > $(CONSTRAINTS)

clean:
	rm -rf $(VENV) $(DEMO_DIR) .pytest_cache
