# Set-up and the everyday commands. A fresh machine needs only Python 3.11+ and make.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test bench clean

BENCH_ARGS ?= --quick

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)        ## sync sample_corpus/, search it, edit/delete/rename and sync again
	bash ops/demo.sh

test: $(STAMP)        ## the whole test suite (real LanceDB, the real model)
	$(BIN)/python -m pytest -q

bench: $(STAMP)       ## benchmark figures as ratios; BENCH_ARGS= for the full sizes
	$(BIN)/python -m bench $(BENCH_ARGS)

clean:
	rm -rf .demo .upwell .pytest_cache .hypothesis
