# The two commands of the README: `make demo` and `make test`.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint install clean mutation

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -c constraints.txt -e '.[dev]'
	touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/unbin demo --out demo-out --cores 2

# The rule files are formatted by snakefmt; `snakemake --lint` on the packaged Snakefile with the
# tiny `.test/` config runs in pytest (tests/workflow/test_rules.py).
test: lint
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check src tests benchmarks workflow/scripts .test
	$(BIN)/mypy
	$(BIN)/snakefmt --check src/unbin/workflow

# Mutation testing of the statistics modules against their unit tests ([tool.mutmut] in
# pyproject.toml); not part of CI. All modules take hours (~2,500 mutants); one module:
# `make mutation MUTANTS='unbin.refit.contrasts*'`. Survivors: `$(BIN)/mutmut results`.
MUTANTS ?=
mutation: $(STAMP)
	$(BIN)/python -m pip install --quiet -c constraints.txt -e '.[dev,mutation]'
	$(BIN)/mutmut run --max-children 2 $(MUTANTS)
	$(BIN)/mutmut results

clean:
	rm -rf $(VENV) demo-out mutants
