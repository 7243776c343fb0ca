# fe3d: the two set-up commands are `make demo` and `make test`; both work from nothing.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint unit bench clean

$(BIN)/python:
	$(PY) -m venv $(VENV)

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[dev]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/fe3d run cases/demo/case.toml --out runs/demo --overwrite

lint: $(STAMP)
	$(BIN)/ruff check fe3d tests benchmarks
	$(BIN)/lint-imports

# pytest exits 5 when it collects no test: treat that as a failure, never a silent pass.
unit: $(STAMP)
	$(BIN)/python -m pytest -n 2 tests; rc=$$?; \
	if [ $$rc -eq 5 ]; then echo "pytest collected no tests" >&2; exit 1; fi; exit $$rc

test: lint unit

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py
	$(BIN)/python benchmarks/mesh_bench.py
	$(BIN)/python benchmarks/flow_bench.py
	$(BIN)/python benchmarks/step_cost.py
	$(BIN)/python benchmarks/tracking_bench.py
	$(BIN)/python benchmarks/post_bench.py
	$(BIN)/python benchmarks/figures_bench.py
	$(BIN)/python benchmarks/ensemble_bench.py
	$(BIN)/python benchmarks/newton_bench.py
	$(BIN)/python benchmarks/checkpoint_bench.py
	$(BIN)/python benchmarks/memory_bench.py
	$(BIN)/python benchmarks/script_vs_run.py
	$(BIN)/python benchmarks/corridor_vs_uniform.py --length 1000 --half-width 400

clean:
	rm -rf runs .pytest_cache .ruff_cache
