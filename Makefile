# Two set-up commands: `make demo` and `make test`. Both build .venv from pyproject.toml.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
DEMO_DIR ?= demo_out

.PHONY: demo test bench clean

$(BIN)/aoi-fix: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e ".[test]"
	touch $@

demo: $(BIN)/aoi-fix
	$(BIN)/aoi-fix demo $(DEMO_DIR)

test: $(BIN)/aoi-fix
	$(BIN)/python -m pytest

bench: $(BIN)/aoi-fix
	$(BIN)/python benchmarks/run.py

clean:
	rm -rf $(VENV) $(DEMO_DIR) benchmarks/out
