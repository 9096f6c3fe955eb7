# Two entry points: `make demo` runs the whole job on the invented region, `make test` runs the tests.
# Both create a local virtual environment in .venv on first use (needs only Python 3.11+ and pip).
PYTHON ?= python3
VENV := .venv
STAMP := $(VENV)/.installed

.PHONY: demo test bench clean

demo: $(STAMP)
	$(VENV)/bin/areamap demo --out demo-output

test: $(STAMP)
	$(VENV)/bin/python -m pytest

bench: $(STAMP)
	$(VENV)/bin/python benchmarks/run_all.py

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(VENV)/bin/python -m pip install --upgrade pip
	$(VENV)/bin/python -m pip install -e '.[test,fast]'
	touch $(STAMP)

clean:
	rm -rf $(VENV) demo-output
