# Set-up and entry points. `make demo` and `make test` work on a fresh clone: each creates the
# virtual environment in .venv (the exact tested versions of constraints.txt) when it is missing or stale.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin

.PHONY: demo test test-slow lint install clean

$(VENV)/.installed: pyproject.toml constraints.txt
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -c constraints.txt -e '.[test]'
	touch $@

install: $(VENV)/.installed

demo: $(VENV)/.installed
	$(BIN)/bigsmooth demo $(DEMO_ARGS)

lint: $(VENV)/.installed
	$(BIN)/ruff check bigsmooth tests
	$(BIN)/ruff format --check bigsmooth tests

# lint first; two test processes (pytest-xdist): the suite is mostly command-line runs in subprocesses
test: lint
	$(BIN)/python -m pytest -q -n 2 $(TEST_ARGS)

test-slow: $(VENV)/.installed
	$(BIN)/python -m pytest -q -m slow $(TEST_ARGS)

clean:
	rm -rf $(VENV) bigsmooth-demo .pytest_cache
