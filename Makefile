# Two commands on a fresh machine: `make demo` and `make test`. Both create .venv as needed.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
DEMO_OUT ?= demo_output
JOBS   ?= 2

.PHONY: demo test bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(VENV)/.installed $@

demo: $(VENV)/.installed
	$(BIN)/patchwood demo --out $(DEMO_OUT) --force

test: $(VENV)/.installed-test
	$(BIN)/python -m pytest -n $(JOBS) -q

bench: $(VENV)/.installed
	$(BIN)/python benchmarks/features.py
	$(BIN)/python benchmarks/train.py
	$(BIN)/python benchmarks/scan.py
	$(BIN)/python benchmarks/load.py
	$(BIN)/python benchmarks/memory.py
	$(BIN)/python benchmarks/baseline.py
	$(BIN)/python benchmarks/accuracy.py

clean:
	rm -rf $(VENV) $(DEMO_OUT) .pytest_cache
