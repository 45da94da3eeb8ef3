# Two commands for a fresh machine: `make demo` and `make test`. Both create .venv if missing and
# install with the exact pins in constraints.txt.
PY ?= python3.11
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test bench bench-quick install clean

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade "pip>=23"

$(STAMP): $(BIN)/python pyproject.toml constraints.txt
	$(BIN)/pip install -q -c constraints.txt -e ".[test]"
	touch $(STAMP)

install: $(STAMP)

test: $(STAMP)
	$(BIN)/python -m pytest tests

demo: $(STAMP)
	$(BIN)/python demos/run_demo.py

bench: $(STAMP)
	$(BIN)/python bench/run_all.py

bench-quick: $(STAMP)
	$(BIN)/python bench/run_all.py --quick

clean:
	rm -rf build dist src/*.egg-info .pytest_cache demo_output
