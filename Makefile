# Two entry points: `make demo` and `make test`. Both create .venv when missing and refresh it when
# pyproject.toml changes (the stamp file records the last install).
PYTHON ?= python3.11
VENV := .venv
STAMP := $(VENV)/.installed
BIN := $(VENV)/bin

.PHONY: demo test test-fast bench clean-results

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV) || python3 -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	# torch first, exactly pinned, so no other requirement can pull a CUDA build
	$(BIN)/python -m pip install --quiet torch==2.13.0
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/shiftgrid demo --run experiment=demo

# Test files run on TEST_WORKERS pytest-xdist workers, one file (or the files sharing one DAG run;
# tests/conftest.py) per worker at a time; TEST_WORKERS=0 runs them in this process.
TEST_WORKERS ?= 2

test: $(STAMP)
	$(BIN)/python -m pytest -q -n $(TEST_WORKERS) --dist loadscope

test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -n $(TEST_WORKERS) --dist loadscope -m "not e2e"

# Benchmarks print each figure next to its goal; they never fail on timings.
bench: $(STAMP)
	$(BIN)/python bench/ingest_vs_pyarrow.py
	$(BIN)/python bench/startup_overhead.py
	$(BIN)/python bench/demo_stages.py
	$(BIN)/python bench/trainer_vs_bare_torch.py
	$(BIN)/python bench/seed_ensemble.py
	$(BIN)/python bench/bookkeeping_scale.py
	$(BIN)/python bench/planning_time.py
	$(BIN)/python bench/incremental_cost.py
	$(BIN)/python bench/command_latency.py
	$(BIN)/python bench/new_city_latency.py

clean-results:
	rm -rf results/splits results/runs results/grid.* results/report.html results/logs .snakemake
