# Two commands on a fresh machine: `make demo` and `make test`. Both create .venv as needed and
# install the exact versions of requirements/*.lock (made by `make lock`); pyproject.toml keeps
# the version ranges for people who install patchwood into an environment of their own.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
DEMO_OUT ?= demo_output
JOBS   ?= 2
LOCK   := requirements/runtime.lock
LOCK_TEST := requirements/test.lock
# the editable install of patchwood itself, built with the locked setuptools and nothing else
SELF   := --quiet --no-deps --no-build-isolation -e .

.PHONY: demo test test-newest lock bench screenshots clean aot

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(VENV)/.installed: pyproject.toml $(LOCK) | $(BIN)/python
	$(BIN)/python -m pip install --quiet $$(grep -E '^(pip|setuptools|wheel)==' $(LOCK))
	$(BIN)/python -m pip install --quiet -r $(LOCK)
	$(BIN)/python -m pip install $(SELF)
	touch $@

$(VENV)/.installed-test: pyproject.toml $(LOCK) $(LOCK_TEST) | $(BIN)/python
	$(BIN)/python -m pip install --quiet $$(grep -E '^(pip|setuptools|wheel)==' $(LOCK))
	$(BIN)/python -m pip install --quiet -r $(LOCK_TEST)
	$(BIN)/python -m pip install $(SELF)
	touch $(VENV)/.installed $@

# The scan's compiled loops built ahead of time, so a scan starts without numba (detector/_aot.py);
# on a machine without a C compiler this prints a note and scans load numba's loops instead.
AOT_SOURCES := detector/_aot.py detector/_jit.py detector/scan/_kernels.py detector/geometry.py \
	detector/features/_channel_kernels.py
$(VENV)/.aot: $(AOT_SOURCES) $(LOCK) | $(VENV)/.installed
	$(BIN)/python -m detector._aot
	touch $@

# compile them again now (say, after installing a C compiler)
aot: | $(VENV)/.installed
	$(BIN)/python -m detector._aot
	touch $(VENV)/.aot

demo: $(VENV)/.installed $(VENV)/.aot
	$(BIN)/patchwood demo --out $(DEMO_OUT) --jobs $(JOBS) --force

test: $(VENV)/.installed-test $(VENV)/.aot
	$(BIN)/python -m pytest -n $(JOBS) -q

# The suite against the newest releases pyproject.toml's ranges allow today, in a separate
# virtual environment made afresh (the lock files are not used or changed).
test-newest:
	rm -rf .venv-newest
	$(PYTHON) -m venv .venv-newest
	.venv-newest/bin/python -m pip install --quiet --upgrade pip
	.venv-newest/bin/python -m pip install --quiet --upgrade --upgrade-strategy eager -e '.[test]'
	.venv-newest/bin/python -m pip freeze --exclude-editable > .venv-newest/versions.txt
	.venv-newest/bin/python -m pytest -n $(JOBS) -q -p no:cacheprovider

# Re-pin every dependency to the newest releases the ranges allow (see requirements/lock.py);
# run `make clean test` before committing the new lock files.
lock:
	$(PYTHON) requirements/lock.py

bench: $(VENV)/.installed
	$(BIN)/python benchmarks/features.py
	$(BIN)/python benchmarks/train.py
	$(BIN)/python benchmarks/scan.py
	$(BIN)/python benchmarks/load.py
	$(BIN)/python benchmarks/memory.py
	$(BIN)/python benchmarks/baseline.py
	$(BIN)/python benchmarks/accuracy.py

# The README's screenshots of the review page, saved by its browser tests (needs Chromium).
screenshots: $(VENV)/.installed-test
	PATCHWOOD_SCREENSHOTS=docs $(BIN)/python -m pytest -q tests/test_review_browser.py

clean:
	rm -rf $(VENV) .venv-newest $(DEMO_OUT) .pytest_cache detector/_aot_kernels*
