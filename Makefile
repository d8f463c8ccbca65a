# One way to run things, the same on a laptop and in CI.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: run test lint bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

# torch goes first and pinned: an open-ended requirement can pull a multi-GB CUDA build.
$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/pip install --quiet --disable-pip-version-check torch==2.13.0
	$(BIN)/pip install --quiet --disable-pip-version-check -e '.[test]'
	touch $(STAMP)

run: $(STAMP)
	$(BIN)/gradfence

test: $(STAMP)
	$(BIN)/ruff check core app tests bench
	$(BIN)/ruff format --check core app tests bench
	$(BIN)/mypy
	$(BIN)/pytest

bench: $(STAMP)
	$(BIN)/python bench/engine.py
	$(BIN)/python bench/maps.py
	$(BIN)/python bench/advise.py
	$(BIN)/python bench/ui.py

clean:
	rm -rf $(VENV) .mypy_cache .pytest_cache .ruff_cache
