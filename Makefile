# Every target sets itself up on a fresh machine: it creates .venv when absent and installs what it needs.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test bench clean

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e ".[test,cluster,xlsx]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/python -m windowfinder.demo

test: $(STAMP)
	$(BIN)/python -m pytest -q -p no:cacheprovider

bench: $(STAMP)
	$(BIN)/python -m benchmarks.run

clean:
	rm -rf out demo-study .pytest_cache
