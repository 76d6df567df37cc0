# jointstat developer commands. Every target creates .venv and installs the pinned dependencies when missing.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: install test lint format demo bench lock clean browser

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/pip install -q -c constraints.txt -e '.[dev]'
	touch $(STAMP)

install: $(STAMP)

lint: $(STAMP)
	$(BIN)/ruff check service tests
	$(BIN)/ruff format --check service tests
	$(BIN)/mypy

format: $(STAMP)
	$(BIN)/ruff format service tests
	$(BIN)/ruff check --fix service tests

# The console's browser tests (tests/test_console_browser.py) drive Debian's Chromium through its chromedriver
# with Selenium; nothing is downloaded at run time. Installed here when missing and apt-get can run as root;
# otherwise those tests are skipped, saying why.
BROWSER_PACKAGES := chromium chromium-driver

browser:
	@if command -v chromium >/dev/null 2>&1 && command -v chromedriver >/dev/null 2>&1; then :; \
	elif [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
		echo "installing $(BROWSER_PACKAGES) for the console's browser tests"; \
		( apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq $(BROWSER_PACKAGES) >/dev/null ) \
			|| echo "could not install $(BROWSER_PACKAGES): the console's browser tests will be skipped"; \
	else \
		echo "no chromium/chromedriver and no apt-get as root to install them: the console's browser tests will be skipped"; \
	fi

test: lint browser
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
	rm -rf $(VENV) build *.egg-info .pytest_cache .ruff_cache .mypy_cache
