# Set-up and everyday commands. Each target creates .venv if missing and is safe to rerun.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
# torch first, pinned: the CPU wheel; anything looser pulls a multi-GB CUDA build.
TORCH := torch==2.13.0

.PHONY: install demo test test-fast bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet $(TORCH)
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/coreach demo

test: $(STAMP)
	$(BIN)/python -m pytest -n 2 --dist loadfile

test-fast: $(STAMP)
	$(BIN)/python -m pytest -n 2 --dist loadfile -m "not slow"

bench: $(STAMP)
	$(BIN)/coreach bench train

clean:
	rm -rf .coreach mlflow.db mlartifacts data reports
