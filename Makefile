# The two commands of the README. Both build a local virtual environment first.
PYTHON ?= $(shell command -v python3.11 || command -v python3)
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test test-slow bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/povmfit demo --out demo-output --overwrite

test: $(STAMP)
	$(BIN)/python -m pytest -q

test-slow: $(STAMP)
	$(BIN)/python -m pytest -q -m slow

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py

clean:
	rm -rf $(VENV) demo-output build *.egg-info
