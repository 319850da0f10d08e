# The two quick-start commands: `make run` and `make test`. Each builds .venv
# from this repository's files alone.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: run test lint venv clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

## Set up and run the service on embedded SQLite with the demo scenario loaded.
run: $(STAMP)
	KEELSON_DATABASE_URL=$${KEELSON_DATABASE_URL:-sqlite:///var/keelson.db} \
	  $(BIN)/keelson demo --serve

## Set up and run the whole test suite.
test: $(STAMP)
	$(BIN)/python -m pytest -n 2 --dist loadgroup

lint: $(STAMP)
	$(BIN)/ruff check engine service migrations tests
	$(BIN)/mypy engine service

clean:
	rm -rf $(VENV) var .pytest_cache .mypy_cache .ruff_cache
