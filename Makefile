# Two entry points for a fresh clone (see README): `make demo` and `make test`.
# Both create .venv, install nearsight with its test extras, then run.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
PYTEST_ARGS ?=
# Test processes: one a core on this project's 2-core machines (pytest-xdist); a test module stays in
# one process (--dist loadfile), so module fixtures such as a trained store are built once.
TEST_WORKERS ?= 2

.PHONY: demo test install clean-venv

# -qq: pip's errors only; a machine whose pip configuration names an index folder that is not there
# otherwise prints a warning a line per package, which buries the demo's own report.
$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -qq -e ".[test]"
	touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/nearsight demo --out nearsight-demo

# pytest exits 5 when a selection (e.g. -k) matches no test: not a failure.
test: $(STAMP)
	bash scripts/system-deps.sh
	$(BIN)/python -m pytest -n $(TEST_WORKERS) --dist loadfile $(PYTEST_ARGS); rc=$$?; if [ $$rc -eq 5 ]; then exit 0; fi; exit $$rc

clean-venv:
	rm -rf $(VENV)
