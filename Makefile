# Two entry points: `make demo` and `make test`.  Both create (or reuse) .venv and install
# climodes into it from this folder, so a fresh machine needs only Python 3.11+ and make.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.climodes-installed

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/python demo_fields/generate.py
	$(BIN)/climodes run configs/demo.yaml
	$(BIN)/python demo_fields/compare.py results/demo

test: $(STAMP)
	$(BIN)/python -m pytest

clean:
	rm -rf $(VENV) results build src/*.egg-info demo_fields/*.nc

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py
	$(BIN)/python benchmarks/layouts.py
