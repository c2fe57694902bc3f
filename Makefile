# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
# Both create or refresh .venv; the stamp file is rebuilt only when pyproject.toml changes.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.sitepool-installed
DEMO_OUT ?= demo-output

.PHONY: venv demo demo-table test lint typecheck unit bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	# torch first and pinned: the CPU wheel; an unpinned torch pulls a CUDA build.
	$(BIN)/python -m pip install --quiet torch==2.13.0
	$(BIN)/python -m pip install --quiet flwr==1.42.0 -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

# The image rehearsal is the demo (the real case of the job); the feature-table one stays.
demo: venv
	$(BIN)/sitepool rehearse --images --out $(DEMO_OUT)

demo-table: venv
	$(BIN)/sitepool rehearse --out $(DEMO_OUT)-table

lint: venv
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

typecheck: venv
	$(BIN)/mypy

unit: venv
	$(BIN)/pytest

test: lint typecheck unit

bench: venv
	$(BIN)/python -m simulations.benchmarks.rounds
	$(BIN)/python -m simulations.benchmarks.adaptation
	$(BIN)/python -m simulations.benchmarks.drift
	$(BIN)/python -m simulations.benchmarks.planning
	$(BIN)/python -m simulations.benchmarks.resolution
	$(BIN)/python -m simulations.benchmarks.images

clean:
	rm -rf $(VENV) $(DEMO_OUT) $(DEMO_OUT)-table .mypy_cache .pytest_cache .ruff_cache
