# Two entry points for a fresh machine with Python 3.11+ and make:
#   make demo   - set up .venv and run one simulated clear day on the bench
#   make test   - set up .venv and run the whole test suite
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml Makefile
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,plot]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/heliotrope demo

test: $(STAMP)
	$(BIN)/ruff check daemon drivers sim_instrument tests benchmarks
	$(BIN)/python -m pytest -q -n 4 --durations=10

lint: $(STAMP)
	$(BIN)/ruff check daemon drivers sim_instrument tests benchmarks

bench: $(STAMP)
	$(BIN)/python -m pip install --quiet -e '.[test,bench]'
	set -e; for f in benchmarks/bench_*.py; do echo "== $$f"; $(BIN)/python $$f; done

clean:
	rm -rf $(VENV) build *.egg-info
