# Two entry points: `make demo` and `make test`. Each builds the virtual environment first.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
DEMO_DIR ?= campaigns/demo-sled-aftbody

.PHONY: demo test test-fast lint bench clean

$(BIN)/python:
	@$(PYTHON) -c 'import sys; sys.exit(sys.version_info < (3, 11))' || { echo "sortie needs Python 3.11 or newer as $(PYTHON)"; exit 2; }
	@$(PYTHON) -m venv $(VENV) || { echo "cannot create a virtual environment; on Debian install it with: apt-get install python3-venv"; exit 2; }
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	@touch $@

demo: $(VENV)/.installed
	$(BIN)/sortie check configs/sled-aftbody.yaml
	rm -rf $(DEMO_DIR)  # the demo always starts afresh
	$(BIN)/sortie run configs/sled-aftbody.yaml --dir $(DEMO_DIR)
	$(BIN)/sortie report $(DEMO_DIR)

test: $(VENV)/.installed
	$(BIN)/ruff check .
	$(BIN)/python -m pytest

test-fast: $(VENV)/.installed
	$(BIN)/python -m pytest -m "not slow"

lint: $(VENV)/.installed
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

clean:
	rm -rf $(VENV) campaigns .pytest_cache
