# Two commands set up everything on a fresh machine with Python 3.11: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEMO_OUT ?= demo-output

export FLWR_TELEMETRY_ENABLED := 0
export FLWR_DISABLE_UPDATE_CHECK := 1

.PHONY: install demo test lint clean

$(STAMP): pyproject.toml
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	@touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/federation demo --out $(DEMO_OUT)

test: $(STAMP)
	$(BIN)/ruff check federation site_agent simulations tests
	$(BIN)/python -m pytest -q

lint: $(STAMP)
	$(BIN)/ruff check federation site_agent simulations tests

clean:
	rm -rf $(DEMO_OUT) .pytest_cache
