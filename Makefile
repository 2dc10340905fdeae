PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
OUT ?= demo-out

.PHONY: demo test clean bench chromium

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

# The report test renders the demo report in headless Chromium (Debian package `chromium`).
# Install it when missing and the machine allows (root + apt-get); otherwise that test skips
# and says why.
chromium:
	@command -v chromium >/dev/null 2>&1 || command -v chromium-browser >/dev/null 2>&1 || { \
	  if [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
	    (apt-get update -q && apt-get install -y -q chromium) >/dev/null || \
	      echo "make: could not install chromium; the report rendering test will be skipped"; \
	  else \
	    echo "make: chromium is missing and cannot be installed here (needs root and apt-get); the report rendering test will be skipped"; \
	  fi; }

test: $(VENV)/.installed-test chromium
	$(BIN)/python -m pytest

bench: $(VENV)/.installed-test
	$(BIN)/python benchmarks/bench_scan.py
	$(BIN)/python benchmarks/bench_naive.py
	$(BIN)/python benchmarks/bench_big.py

clean:
	rm -rf $(VENV) $(OUT)
