# The two commands a newcomer needs: `make demo` and `make test`.
# Each creates .venv when it is missing and installs the project into it (editable).
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.assim-installed
CORES  ?= 2

.PHONY: demo test test-fast bench bench-quick lint clean

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
	$(VENV)/bin/snakemake --snakefile workflow/Snakefile --configfile config/config.yaml \
		--cores $(CORES) --printshellcmds
	@echo
	@echo "assim demo finished. What it produced (sample basins are invented):"
	@echo "  forecasts : $$(ls results/forecasts/forecast-*.nc | tr '\n' ' ')"
	@echo "  runs      : results/openloop.nc results/analysis.nc results/hindcast.nc"
	@echo "  skill     : results/skill.csv results/skill.nc"
	@echo "  figures   : results/figures/ ($$(ls results/figures | wc -l) PNG files)"
	@echo "  report    : results/report.html"
	@echo "  logs      : results/logs/"
	@echo
	@echo "CAUTION: research guidance only, subordinate to official flood warnings and local authorities."

bench: $(STAMP)
	$(PY) benchmarks/run.py

bench-quick: $(STAMP)
	$(PY) benchmarks/run.py --quick

lint: $(STAMP)
	$(VENV)/bin/ruff check .

clean:
	rm -rf results .snakemake
