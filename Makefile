# Two commands do all set-up on a fresh machine with Python 3.11+ and pip:
#   make demo   - virtual environment, install, generate the demo experiment, run it
#   make test   - virtual environment, install, run the test suite
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
DEMO_OUT ?= demo-output

.PHONY: demo test bench clean

$(BIN)/activate: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[dev]"
	touch $(BIN)/activate

demo: $(BIN)/activate
	$(BIN)/lasecyto demo --out $(DEMO_OUT)

test: $(BIN)/activate
	$(BIN)/python -m pytest -q

bench: $(BIN)/activate
	$(BIN)/python benchmarks/lines.py

clean:
	rm -rf $(VENV) $(DEMO_OUT) build *.egg-info
