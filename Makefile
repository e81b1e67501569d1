# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
# Two stamps: `make demo` needs only the runtime dependencies; `make test` adds the test extras
# (pytest, hypothesis, ruff, mypy, scipy, playwright ...), which are most of the install time.
RUNTIME := $(VENV)/.installed-runtime
STAMP := $(VENV)/.installed

.PHONY: demo test lint typecheck unit browser-deps bench mutation clean

# The venv gets no pip of its own when the system's pip can install into it (pip >= 22.3,
# `--python`): that saves the seconds ensurepip takes; otherwise ensurepip as usual.
$(BIN)/python:
	$(PYTHON) -m venv --without-pip $(VENV)
	@$(PYTHON) -m pip --python $(BIN)/python --version >/dev/null 2>&1 || \
		$(BIN)/python -m ensurepip --quiet
# The venv's own pip when it has one, else the system's pointed at the venv. --no-compile,
# then one compileall on both cores: where PYTHONDONTWRITEBYTECODE is set (as on CI) Python
# never caches what it compiles, and every tracelab process paid ~1.5 s compiling polars,
# numpy, typer ... at start (a 2,000-line ingest took 2.7 s, 1.2 s compiled; the bytecode
# is read even so). Files already compiled are skipped; a file that does not compile (a
# package's template) is left to Python, hence `|| true`.
PIP = $(if $(wildcard $(BIN)/pip),$(BIN)/python -m pip,$(PYTHON) -m pip --python $(BIN)/python)
PIP_INSTALL = $(PIP) install --quiet --disable-pip-version-check --no-compile
COMPILE = $(BIN)/python -m compileall -q -j 0 \
	"$$($(BIN)/python -c 'import sysconfig; print(sysconfig.get_path("purelib"))')" \
	tracelab pipelines >/dev/null 2>&1 || true

# Reinstall whenever pyproject.toml changes.
$(RUNTIME): pyproject.toml | $(BIN)/python
	$(PIP_INSTALL) -e .
	$(COMPILE)
	touch $(RUNTIME)

$(STAMP): pyproject.toml $(RUNTIME)
	$(PIP_INSTALL) -e '.[test]'
	$(COMPILE)
	touch $(STAMP)

demo: $(RUNTIME)
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

# pytest exits 5 when it collected nothing: an empty suite is not green. Both cores
# (pytest-xdist): each test module runs whole on one worker, so its module-scoped fixtures
# are built once (docs/testing.md, "Run time"); PYTEST_WORKERS=0 runs in one process.
PYTEST_WORKERS ?= 2
unit: $(STAMP)
	@$(BIN)/pytest -n $(PYTEST_WORKERS) --dist loadfile; rc=$$?; if [ $$rc -eq 5 ]; then echo "no tests collected" >&2; exit 1; fi; exit $$rc

test: lint typecheck browser-deps unit

bench: $(STAMP)
	$(BIN)/python bench/physics.py
	$(BIN)/python bench/ingest.py --lines 20000000

# Mutation testing (not part of `make test`; see docs/testing.md for scores and timings):
# mutmut over physics/, analyses/, forensics/ in scratch copies, then the SQL probe.
# MUTATION_ARGS="--target physics --sample 200" narrows it.
mutation: $(STAMP)
	$(PIP_INSTALL) -e '.[test,mutation]'
	$(BIN)/python -m tools.mutation $(MUTATION_ARGS)

clean:
	rm -rf $(VENV) demo_out .pytest_cache .mypy_cache .ruff_cache
