# Two-command set-up: `make run` and `make test` create .venv when missing.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed-stamp

# numpy's BLAS threads fight over 2 cores on small matrices (100x slower under load)
OPENBLAS_NUM_THREADS ?= 1
OMP_NUM_THREADS ?= 1
export OPENBLAS_NUM_THREADS OMP_NUM_THREADS

.PHONY: run test lint bench demo clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[test]"
	touch $(STAMP)

run: $(STAMP)
	$(VENV)/bin/saedkit gui --demo

test: $(STAMP)
	QT_QPA_PLATFORM=offscreen $(PY) -m pytest -q -p no:cacheprovider

lint: $(STAMP)
	$(VENV)/bin/ruff check app tests benchmarks tools sample_patterns

bench: $(STAMP)
	QT_QPA_PLATFORM=offscreen $(PY) benchmarks/run_all.py

demo: $(STAMP)
	$(VENV)/bin/saedkit demo --out demo_output

clean:
	rm -rf $(VENV) demo_output build app/*.egg-info
