# The two commands a newcomer needs: `make demo` and `make test`.
# Each creates .venv when it is missing and installs the project into it (editable).
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.assim-installed
CORES  ?= 2

.PHONY: demo test test-fast bench lint clean

$(STAMP): pyproject.toml
	@test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[test]"
	@touch $(STAMP)

test: $(STAMP)
	$(PY) -m pytest

test-fast: $(STAMP)
	$(PY) -m pytest -m "not slow"

demo: $(STAMP)
	$(PY) sample_basin/generate.py --check
	$(VENV)/bin/snakemake --snakefile workflow/Snakefile --configfile config/config.yaml \
		--cores $(CORES) --printshellcmds
	@$(PY) -m assim.demo_summary config/config.yaml

bench: $(STAMP)
	$(PY) benchmarks/run.py

lint: $(STAMP)
	$(VENV)/bin/ruff check .

clean:
	rm -rf results .snakemake
