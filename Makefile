# nodekeep: make demo (run the main job on an invented survey), make test (whole suite + lint)
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
DEMO_DIR ?= demo-out

.PHONY: demo test lint venv bench clean

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet -e '.[test]'
	touch $@ $(VENV)/.installed

venv: $(VENV)/.installed

demo: $(VENV)/.installed
	rm -rf $(DEMO_DIR)
	$(BIN)/nodekeep demo $(DEMO_DIR)

lint: $(VENV)/.installed-test
	$(BIN)/ruff check archive tests seeds bench migrations

test: $(VENV)/.installed-test lint
	$(BIN)/pytest -n 2 -q tests

bench: $(VENV)/.installed-test
	$(BIN)/python -m bench.ingest
	$(BIN)/python -m bench.solve

clean:
	rm -rf $(VENV) $(DEMO_DIR) build dist *.egg-info
