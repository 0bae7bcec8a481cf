# rfisieve: make demo | make test | make bench
# Needs only Python >= 3.11; everything else is installed into .venv from the package index.

PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
CORES  ?= 2
STAMP  := $(VENV)/.rfisieve-installed
export PATH := $(abspath $(BIN)):$(PATH)

.PHONY: demo test bench install clean-demo

install: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@

demo: $(STAMP)
	test -d demo/night/scans || $(BIN)/rfisieve simulate demo/night
	$(BIN)/rfisieve run --inputs 'demo/night/scans/*.h5' --outdir demo/out --cores $(CORES)
	@echo "Open demo/out/report/index.html in a browser for the morning review;"
	@echo "logs and job timings are in demo/out/logs/ and demo/out/benchmarks/."

test: $(STAMP)
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python bench/throughput.py

clean-demo:
	rm -rf demo/out
