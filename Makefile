# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.mlbridge-installed

.PHONY: demo test bench clean-venv

$(STAMP): pyproject.toml constraints.txt
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet torch==2.13.0
	$(PY) -m pip install --quiet -c constraints.txt -e '.[test]'
	$(PY) -m mlbridge.models fetch
	touch $(STAMP)

demo: $(STAMP)
	OMP_NUM_THREADS=2 $(PY) -m mlbridge demo --out demo-output

test: $(STAMP)
	OMP_NUM_THREADS=2 $(PY) -m pytest -q tests

bench: $(STAMP)
	for b in benchmarks/bench_*.py; do $(PY) $$b || exit 1; done

clean-venv:
	rm -rf $(VENV)
