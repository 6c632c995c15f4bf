# One entry point per job. Every target creates the virtual environment it needs.
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
# Two stamps: the demo needs only slicetime and its runtime dependencies; the tests,
# lint, benchmarks and validation also need the test tools (pytest, pybids, nilearn, ...).
RUNTIME_STAMP := $(VENV)/.installed-runtime
STAMP := $(VENV)/.installed-test

.PHONY: demo test lint bench validate clean

$(RUNTIME_STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip uninstall --quiet --yes slicetime 2>/dev/null || true  # the name before slicetime-bids
	$(PY) -m pip install --quiet -e .
	touch $(RUNTIME_STAMP)

$(STAMP): $(RUNTIME_STAMP)
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(RUNTIME_STAMP)
	$(VENV)/bin/slicetime demo --out demo-output

test: lint
	$(PY) -m pytest -q

# ruff's rules (no auto-formatter; line length 100) and mypy (settings in pyproject.toml)
lint: $(STAMP)
	$(PY) -m ruff check slicetime tests benchmarks fixtures validation
	$(PY) -m mypy

clean:
	rm -rf $(VENV) demo-output .pytest_cache .hypothesis build *.egg-info

bench: $(STAMP)
	$(PY) benchmarks/bench_audit.py --sizes 2000,20000 $(if $(BENCH_HUGE),--huge) --out bench-results/audit.json
	$(PY) benchmarks/bench_correct.py --runs standard,multiband,batch,floor --volumes 600 --repeat 5 \
		--multiband-volumes 1200 --batch-runs 6 --batch-volumes 200 --out bench-results/correct.json
	$(PY) benchmarks/bench_fix.py --sizes 2000,20000 --out bench-results/fix.json
	$(PY) benchmarks/bench_verify.py --repeat 3 --out bench-results/verify.json
	$(PY) benchmarks/bench_edges.py --seeds 15 --out bench-results/edges.json

validate: $(STAMP)
	$(PY) validation/make_report.py --out docs

.PHONY: verify-study
verify-study: $(STAMP)
	$(PY) validation/verify_study.py --out docs
	$(PY) validation/verify_heldout.py --seeds 1000:1002 --out docs/verify-heldout.json
	$(PY) validation/verify_heldout.py --seeds 1000:1010 --families realistic \
		--out docs/verify-heldout-realistic.json
	$(PY) validation/verify_heldout.py --report-only --out docs/verify-heldout.json \
		--realistic docs/verify-heldout-realistic.json \
		--before docs/verify-heldout-before.json \
		--project docs/verify-previous.json docs/verify.json --doc docs/verify.md
