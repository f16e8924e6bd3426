# Two commands on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
# The CPU build of torch is installed first and pinned, so that nothing pulls a CUDA build.
TORCH_PIN := torch==2.13.0

.PHONY: demo test bench setup clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(VENV)/.installed: $(BIN)/python pyproject.toml
	$(BIN)/pip install $(TORCH_PIN)
	$(BIN)/pip install -e '.[test,dask]'
	touch $@

setup: $(VENV)/.installed

demo: setup
	$(BIN)/python demo_project/run_demo.py

test: setup
	$(BIN)/python -m pytest -q

bench: setup
	$(BIN)/python benchmarks/run_all.py

clean:
	rm -rf $(VENV) build *.egg-info
