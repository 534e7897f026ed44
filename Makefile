# Two entry points: `make demo` and `make test`. Each creates .venv when missing; `make test`
# also installs what the tests need outside Python (scripts/provision: headless Chromium).
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test provision bench clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[test]"
	touch $(STAMP)

# First, so that a machine that cannot install the browser is told before the pip install.
provision:
	@sh scripts/provision

demo: $(STAMP)
	$(PY) -m encodex demo --out demo_output

test: provision $(STAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) -m pip install --quiet -e ".[test,bench]"
	$(PY) benchmarks/bench_solver.py

clean:
	rm -rf $(VENV) demo_output .pytest_cache
