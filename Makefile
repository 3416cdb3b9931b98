# The two commands of the README: `make demo` and `make test`.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint install clean

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -c constraints.txt -e '.[dev]'
	touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/unbin demo --out demo-out --cores 2

test: $(STAMP)
	$(BIN)/ruff check src tests benchmarks workflow/scripts
	$(BIN)/mypy
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check src tests benchmarks workflow/scripts
	$(BIN)/mypy

clean:
	rm -rf $(VENV) demo-out
