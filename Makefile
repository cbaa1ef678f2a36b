# Two set-up commands for a fresh machine: `make demo` and `make test` (see README.md).
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-$(shell cat pyproject.toml | cksum | cut -d' ' -f1)

.PHONY: demo test fuzz slow bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,cluster]'
	rm -f $(VENV)/.installed-*
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/infercost run --out reports/default

test: $(STAMP)
	$(BIN)/python -m pytest -q

fuzz: $(STAMP)
	$(BIN)/python -m pytest -q -m slow tests/reliability

slow: $(STAMP)
	$(BIN)/python -m pytest -q -m slow

bench: $(STAMP)
	$(BIN)/python -m tests.perf.run_all

clean:
	rm -rf $(VENV) reports/*/ reports/*.sqlite*
