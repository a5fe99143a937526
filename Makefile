# Apportion: the two commands are `make demo` and `make test`; `make serve` runs the API.
# `make test` runs pytest on two workers (pytest-xdist), one test module per worker at a time
# (`--dist loadscope`), so a module's fitted-model snapshot is built once (tests/snapshots.py).
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEVSTAMP := $(VENV)/.installed-dev

.PHONY: serve test demo lint format openapi bench clean

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/pip install -q --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install -q -e .
	touch $(STAMP)

$(DEVSTAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install -q -e '.[dev]'
	touch $(STAMP) $(DEVSTAMP)

serve: $(STAMP)
	$(BIN)/apportion db upgrade
	$(BIN)/apportion serve --host 127.0.0.1 --port 8000

demo: $(STAMP)
	$(BIN)/python -m apportion.demo.run

test: $(DEVSTAMP)
	$(BIN)/ruff check apportion tests bench migrations
	$(BIN)/ruff format --check apportion tests bench migrations
	$(BIN)/mypy apportion
	$(BIN)/python -m pytest -n 2 --dist loadscope
	@command -v node >/dev/null || { echo "make test: the JavaScript evaluator's tests need Node.js >= 18 (Debian: apt-get install nodejs)"; exit 1; }
	node --test js/test/

lint: $(DEVSTAMP)
	$(BIN)/ruff check apportion tests bench migrations
	$(BIN)/ruff format --check apportion tests bench migrations
	$(BIN)/mypy apportion

format: $(DEVSTAMP)
	$(BIN)/ruff format apportion tests bench migrations
	$(BIN)/ruff check --fix apportion tests bench migrations

openapi: $(STAMP)
	$(BIN)/apportion openapi --out openapi/openapi.json

bench: $(DEVSTAMP)
	$(BIN)/python bench/ingest.py
	$(BIN)/python bench/fit.py
	$(BIN)/python bench/optimize.py
	$(BIN)/python bench/serve.py

clean:
	rm -rf $(VENV) var .pytest_cache
