# lotline: every target creates .venv if missing and installs the project into it.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test bench bench-quick lint serve clean

$(STAMP): pyproject.toml Makefile
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,spark]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/lotline demo --dir demo_run

test: $(STAMP)
	$(BIN)/python -m pytest -q -p no:cacheprovider

bench: $(STAMP)
	$(BIN)/python -m bench.run --readme README.md

bench-quick: $(STAMP)
	$(BIN)/python -m bench.run --quick

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

clean:
	rm -rf $(VENV) build *.egg-info demo_run
