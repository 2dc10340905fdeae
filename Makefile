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

# The test extra includes pyspark so the Spark engine is tested (master local[2]); Spark also
# needs Java 17+ — without it the Spark tests skip and say why.
$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	@command -v java >/dev/null 2>&1 || [ -x "$$JAVA_HOME/bin/java" ] || \
		echo "make test: no Java found; Spark engine tests will be skipped (install openjdk-17-jre-headless)"
	touch $@

demo: $(VENV)/.installed
	$(BIN)/cutscan demo --out $(OUT) --force

test: $(VENV)/.installed-test
	$(BIN)/python -m pytest

bench: $(VENV)/.installed-test
	$(BIN)/python benchmarks/bench_scan.py
	$(BIN)/python benchmarks/bench_naive.py
	$(BIN)/python benchmarks/bench_big.py

clean:
	rm -rf $(VENV) $(OUT)
