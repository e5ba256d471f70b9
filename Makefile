# Two commands do all the set-up: `make demo` and `make test`.
# Both create .venv when it is missing or stale (pyproject.toml changed, or the
# interpreter no longer runs) and install the kit with its train and dev extras into it.

PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp
DEMO_OUT ?= demo-output
# Test workers: one per core; each test process uses one BLAS/torch thread.
TEST_WORKERS ?= 2

.PHONY: demo test lint typecheck format bench clean venv

venv: $(STAMP)

$(STAMP): pyproject.toml
	@if ! $(BIN)/python -c "import sys; sys.exit(sys.version_info < (3, 11))" 2>/dev/null; then \
		echo "creating $(VENV)"; rm -rf $(VENV); $(PYTHON) -m venv $(VENV); \
	fi
	$(BIN)/python -m pip install --upgrade --quiet pip
	@# the distribution was called trainkit before it was renamed; drop a stale install of it
	@$(BIN)/python -m pip uninstall --yes --quiet trainkit 2>/dev/null || true
	$(BIN)/python -m pip install --quiet -e '.[train,dev]'
	@touch $(STAMP)

demo: $(STAMP)
	$(BIN)/trainkit demo --out $(DEMO_OUT)

test: $(STAMP)
	OMP_NUM_THREADS=1 MKL_NUM_THREADS=1 $(BIN)/python -m pytest -n $(TEST_WORKERS) --durations=15

lint: $(STAMP)
	$(BIN)/ruff check trainkit tests benchmarks docs notebooks
	$(BIN)/ruff format --check trainkit tests benchmarks

# Rooms checked so far; the others join as their errors are fixed.
typecheck: $(STAMP)
	$(BIN)/mypy trainkit/core trainkit/screener trainkit/metrics trainkit/jobs \
		trainkit/judging/records.py trainkit/judging/model_card.py

format: $(STAMP)
	$(BIN)/ruff format trainkit tests benchmarks
	$(BIN)/ruff check --fix trainkit tests benchmarks

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py

clean:
	rm -rf $(DEMO_OUT) .pytest_cache .mypy_cache build *.egg-info
