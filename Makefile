# One entry point per job. Every target creates the virtual environment it needs.
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench validate clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/slicetime demo --out demo-output

test: $(STAMP)
	$(PY) -m ruff check slicetime tests benchmarks fixtures validation
	$(PY) -m pytest -q

lint: $(STAMP)
	$(PY) -m ruff check slicetime tests benchmarks fixtures validation

clean:
	rm -rf $(VENV) demo-output .pytest_cache .hypothesis build *.egg-info

bench: $(STAMP)
	$(PY) benchmarks/bench_audit.py --sizes 500,2000,10000 --out bench-results/audit.json
	$(PY) benchmarks/bench_correct.py --runs standard,multiband,batch --volumes 600 --repeat 5 \
		--multiband-volumes 1200 --batch-runs 6 --batch-volumes 200 --out bench-results/correct.json
	$(PY) benchmarks/bench_verify.py --repeat 3 --out bench-results/verify.json

validate: $(STAMP)
	$(PY) validation/make_report.py --out docs

.PHONY: verify-study
verify-study: $(STAMP)
	$(PY) validation/verify_study.py --out docs
