# Two entry points: `make demo` and `make test`. Each builds the virtual environment first, from the
# lock (uv.lock, hashes included): what CI tested is what is installed.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
TOOLS  ?= .tools
UV     := $(TOOLS)/bin/uv
DEMO_DIR ?= campaigns/demo-sled-aftbody
# uv never downloads an interpreter of its own: it uses $(PYTHON).
export UV_PYTHON_DOWNLOADS := never

.PHONY: demo test test-fast lint bench lock clean

$(UV): requirements/uv.txt
	@$(PYTHON) -c 'import sys; sys.exit(sys.version_info < (3, 11))' || { echo "sortie needs Python 3.11 or newer as $(PYTHON)"; exit 2; }
	@$(PYTHON) -m venv $(TOOLS) || { echo "cannot create a virtual environment; on Debian install it with: apt-get install python3-venv"; exit 2; }
	$(TOOLS)/bin/python -m pip install --quiet --disable-pip-version-check --require-hashes -r requirements/uv.txt
	@touch $@

$(VENV)/.installed: uv.lock pyproject.toml | $(UV)
	$(UV) sync --frozen --extra test --python $(PYTHON) --quiet
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

# Re-resolve the lock after a change to pyproject.toml's ranges (a deliberate step, reviewed in the diff).
lock: | $(UV)
	$(UV) lock

clean:
	rm -rf $(VENV) $(TOOLS) campaigns .pytest_cache
