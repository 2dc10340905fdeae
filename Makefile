PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
OUT ?= demo-out

.PHONY: demo test clean bench

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@

demo: $(VENV)/.installed
	$(BIN)/cutscan demo --out $(OUT) --force

test: $(VENV)/.installed-test
	$(BIN)/python -m pytest

bench: $(VENV)/.installed-test
	$(BIN)/python benchmarks/bench_scan.py

clean:
	rm -rf $(VENV) $(OUT)
