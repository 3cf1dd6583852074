# Set-up and everyday commands. Everything runs inside a local .venv made here.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-$(shell cat pyproject.toml | cksum | cut -d' ' -f1)

.PHONY: install lab test bench demo clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test,lab,hdf5,dask,bench]"
	rm -f $(VENV)/.installed-*
	touch $(STAMP)

install: $(STAMP)

lab: install
	$(BIN)/jupyter lab $(if $(filter 0,$(shell id -u)),--allow-root,) example_notebooks/01_workbench.ipynb

test: install
	$(BIN)/python -m pytest -q

bench: install
	$(BIN)/python bench/run_all.py

demo: install
	$(BIN)/msmkit demo -o demo_output

clean:
	rm -rf $(VENV) demo_output .pytest_cache
