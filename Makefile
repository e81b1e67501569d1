# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint typecheck unit browser-deps bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

# Reinstall whenever pyproject.toml changes.
$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/tracelab demo -o demo_out

# Headless Chromium for the report's browser tests (Debian package; no browser download).
browser-deps:
	@command -v chromium >/dev/null 2>&1 || [ -x /usr/bin/chromium ] || \
		{ (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null) || \
		  echo "warning: could not install chromium; browser tests will be skipped"; }

lint: $(STAMP)
	$(BIN)/ruff check tracelab tests bench pipelines

typecheck: $(STAMP)
	$(BIN)/mypy tracelab

# pytest exits 5 when it collected nothing: an empty suite is not green.
unit: $(STAMP)
	@$(BIN)/pytest; rc=$$?; if [ $$rc -eq 5 ]; then echo "no tests collected" >&2; exit 1; fi; exit $$rc

test: lint typecheck browser-deps unit

bench: $(STAMP)
	$(BIN)/python bench/physics.py
	$(BIN)/python bench/ingest.py --lines 20000000

clean:
	rm -rf $(VENV) demo_out .pytest_cache .mypy_cache .ruff_cache
