# forkmap: two commands for users (make demo, make test), plus benchmarks.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
DEMO   ?= demo-data
STAMP  := $(VENV)/.installed

.PHONY: demo test bench soak lint clean venv

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(PY) -m demo_volume.generate --out $(DEMO) --preset default --seed 0 --check 2>/dev/null \
	  || $(PY) -m demo_volume.generate --out $(DEMO) --preset default --seed 0
	$(VENV)/bin/forkmap run configs/demo.toml
	@echo "results: $$(pwd)/runs/demo"
	@echo "report:  $$(pwd)/runs/demo/report/index.html"

lint: $(STAMP)
	$(VENV)/bin/ruff check pipeline demo_volume tests
	$(VENV)/bin/mypy pipeline

test: lint
	$(PY) -m pytest -q

bench: $(STAMP)
	$(PY) -m tests.benchmarks.run $(BENCH_ARGS)

soak: $(STAMP)
	FORKMAP_SOAK=1 $(PY) -m pytest -q tests/test_crash_resume.py

clean:
	rm -rf runs bench-results .pytest_cache .mypy_cache .ruff_cache
