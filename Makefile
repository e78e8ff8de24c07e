# ionwell — developer entry points. Each target sets up .venv itself.
PY      ?= python3
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.installed
DEMO    ?= config/demo-li-trilayer.yaml

.PHONY: demo test test-fast lint format schema clean-demo

$(STAMP): pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e ".[test]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/ionwell run $(DEMO)

test: $(STAMP)
	$(BIN)/python -m pytest -v --durations=15 -n 2 --dist loadfile --no-loadscope-reorder

test-fast: $(STAMP)
	$(BIN)/python -m pytest -m "not slow and not cluster"

lint: $(STAMP)
	$(BIN)/ruff check src tests bench
	$(BIN)/ruff format --check src tests bench
	$(BIN)/snakefmt --check rules workflow/Snakefile

format: $(STAMP)
	$(BIN)/ruff format src tests bench
	$(BIN)/snakefmt rules workflow/Snakefile
	$(BIN)/ruff check --fix src tests bench

schema: $(STAMP)
	$(BIN)/ionwell schema -o config/campaign.schema.json

clean-demo:
	rm -rf campaigns/demo-li-trilayer
