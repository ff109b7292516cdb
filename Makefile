# The two entry points of the README: `make demo` and `make test`.
# Each creates or refreshes the local virtual environment .venv and installs what it needs.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.specflow-installed

.PHONY: demo test bench sysdeps clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

# System packages the tests use (TeX Live, Chromium, SLURM, munge, poppler); installs them
# with apt when run as root and they are missing, otherwise says what is missing.
sysdeps:
	bash scripts/sysdeps.sh

demo: $(STAMP)
	$(VENV)/bin/specflow run specs/canal_yields.toml --cores 2

test: $(STAMP) sysdeps
	$(PY) -m pytest -q -p no:cacheprovider

bench: $(STAMP)
	$(PY) benchmarks/run_all.py

clean:
	rm -rf $(VENV) results .snakemake
