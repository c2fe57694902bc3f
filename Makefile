# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
# Both create or refresh .venv; the stamp file is rebuilt only when pyproject.toml changes.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.sitepool-installed
DEMO_OUT ?= demo-output

.PHONY: venv demo test lint typecheck unit bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	# torch first and pinned: the CPU wheel; an unpinned torch pulls a CUDA build.
	$(BIN)/python -m pip install --quiet torch==2.13.0
	$(BIN)/python -m pip install --quiet flwr==1.42.0 -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

demo: venv
	$(BIN)/sitepool rehearse --out $(DEMO_OUT)

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

clean:
	rm -rf $(VENV) $(DEMO_OUT) .mypy_cache .pytest_cache .ruff_cache
