# Two commands set everything up on a fresh machine:
#   make run    install into .venv and open the window on the bundled sample recording
#   make test   install into .venv (with test extras) and run the whole test suite
PYTHON ?= python3
VENV   ?= .venv
BIN     = $(VENV)/bin

.PHONY: run test bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@

run: $(VENV)/.installed
	$(BIN)/passivefit

test: $(VENV)/.installed
	$(BIN)/python -m pytest

bench: $(VENV)/.installed
	for b in benchmarks/bench_*.py; do $(BIN)/python $$b || exit 1; done

clean:
	rm -rf $(VENV) .pytest_cache
