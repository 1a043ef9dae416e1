# The two commands a new user needs: `make demo` and `make test`. Both build .venv first.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.gapbook-installed

.PHONY: demo test lab bench clean-venv

$(STAMP): pyproject.toml constraints.txt
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -c constraints.txt -e ".[test]"
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/gapbook demo --out records

test: $(STAMP)
	$(PY) -m pytest -q -p no:cacheprovider

lab: $(STAMP)
	$(VENV)/bin/jupyter lab notebooks

bench: $(STAMP)
	for script in benchmarks/*.py; do $(PY) $$script || exit 1; done

clean-venv:
	rm -rf $(VENV)
