# rfisieve: make demo | make test | make bench
# Needs only Python >= 3.11; everything else is installed into .venv from the package index.

PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
CORES  ?= 2
STAMP  := $(VENV)/.rfisieve-installed
export PATH := $(abspath $(BIN)):$(PATH)

.PHONY: demo test bench install bytecode clean-demo

install: $(STAMP) bytecode

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@

# The package's bytecode, written now: where PYTHONDONTWRITEBYTECODE is set Python never
# writes it, and every job process compiled rfisieve's sources again (0.1 s each,
# measured); stale files are rewritten here and ignored by Python until then.  Only a
# speed-up: a checkout that cannot be written to is used as it is.
bytecode: $(STAMP)
	$(BIN)/python -m compileall -q src > /dev/null || true

demo: $(STAMP) bytecode
	test -d demo/night/scans || $(BIN)/rfisieve simulate demo/night
	$(BIN)/rfisieve run --inputs 'demo/night/scans/*.h5' --outdir demo/out --cores $(CORES)
	@echo "Open demo/out/report/index.html in a browser for the morning review;"
	@echo "logs and job timings are in demo/out/logs/ and demo/out/benchmarks/."

test: $(STAMP) bytecode
	$(BIN)/python -m pytest -q

bench: $(STAMP) bytecode
	$(BIN)/python bench/throughput.py

clean-demo:
	rm -rf demo/out
