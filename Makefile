# Set-up is part of every target: a fresh clone needs nothing done by hand.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: test demo demo-records bench venv clean

venv: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

test: $(STAMP)
	$(PY) -m pytest -q

demo: $(STAMP)
	$(PY) -m monitor.demo

# Forty invented years ingested, quality-controlled, and their return levels and trend
# compared with what the generator put in (a few minutes; demo-output/records/).
demo-records: $(STAMP)
	$(PY) -m monitor.demo_decades

bench: $(STAMP)
	$(PY) -m benchmarks

clean:
	rm -rf demo-output bench-output .pytest_cache
