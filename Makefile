# Everything a fresh machine with Python 3.11, pip and make needs.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin

.PHONY: demo example-report test install bench clean

$(BIN)/contentlab: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $@

install: $(BIN)/contentlab

# The demo writes only inside demo-workspace/ (git-ignored), report included: no tracked file changes.
demo: install
	$(BIN)/contentlab demo

# Rewrites the committed example report in reports/ (HTML, CSV tables, and the screenshot when Debian's
# chromium is installed). Run it on purpose when the report changes; commit what it writes.
EXAMPLE_WS := .example-workspace
CHROMIUM ?= chromium
example-report: install
	rm -rf $(EXAMPLE_WS) reports/contentlab-report-*
	$(BIN)/contentlab demo --workspace $(EXAMPLE_WS) --out reports
	rm -rf $(EXAMPLE_WS)
	@if command -v $(CHROMIUM) >/dev/null; then for f in reports/contentlab-report-*.html; do \
	  $(CHROMIUM) --headless --no-sandbox --disable-gpu --hide-scrollbars --user-data-dir=$$(mktemp -d) \
	    --window-size=1200,3000 --screenshot="$${f%.html}.png" "file://$$PWD/$$f" 2>/dev/null; \
	  $(CHROMIUM) --headless --no-sandbox --disable-gpu --hide-scrollbars --user-data-dir=$$(mktemp -d) \
	    --window-size=390,2600 --screenshot="$${f%.html}-phone.png" "file://$$PWD/$$f" 2>/dev/null; done; \
	else echo "$(CHROMIUM) not found: the screenshot in reports/ was not updated"; fi

test: install
	$(BIN)/python -m pytest

bench: install
	for b in benchmarks/bench_*.py; do $(BIN)/python $$b || exit 1; done

clean:
	rm -rf $(VENV) demo-workspace $(EXAMPLE_WS) .pytest_cache
