# jointstat developer commands. Every target creates .venv and installs the pinned dependencies when missing.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: install test lint format demo bench lock clean

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/pip install -q -c constraints.txt -e '.[dev]'
	touch $(STAMP)

install: $(STAMP)

lint: $(STAMP)
	$(BIN)/ruff check service tests
	$(BIN)/ruff format --check service tests

format: $(STAMP)
	$(BIN)/ruff format service tests
	$(BIN)/ruff check --fix service tests

test: lint
	$(BIN)/python -m pytest

demo: $(STAMP)
	$(BIN)/jointstat demo

bench: $(STAMP)
	$(BIN)/jointstat bench garble --json
	$(BIN)/jointstat bench ot --json
	$(BIN)/jointstat bench session --json
	$(BIN)/jointstat bench join --rows 65536 --json
	$(BIN)/jointstat bench faults --sessions 300 --json
	$(BIN)/jointstat bench link --json
	$(BIN)/jointstat bench noise --epsilon 0.5 --sensitivity 1 --samples 200000 --json

lock:
	rm -rf /tmp/jointstat-lock && $(PY) -m venv /tmp/jointstat-lock
	/tmp/jointstat-lock/bin/pip install -q '.[dev]'
	( head -2 constraints.txt; /tmp/jointstat-lock/bin/pip freeze --exclude jointstat ) > constraints.new
	mv constraints.new constraints.txt

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .ruff_cache
