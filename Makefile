# Quick start: `make demo` runs the invented demo plant; `make test` runs the suite.
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed-stamp

.PHONY: install test demo lint bench clean

$(STAMP): pyproject.toml
	@test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install -q --upgrade pip 2>&1 | grep -v '^WARNING: Location' || true
	$(PY) -m pip install -q -e '.[test]' 2>&1 | grep -v '^WARNING: Location' || true
	$(PY) -c "import analysis, server, fastapi, scipy, sqlalchemy, pytest"
	@touch $(STAMP)

install: $(STAMP)

test: $(STAMP)
	$(PY) -m pytest -q tests

demo: $(STAMP)  # make demo PORT=8080 serves on another port
	$(VENV)/bin/halfwatch demo $(if $(PORT),--port $(PORT))

lint: $(STAMP)
	$(VENV)/bin/ruff check analysis server halfwatch_demo tests bench
	$(VENV)/bin/mypy  # analysis/ and server/services ([tool.mypy] in pyproject.toml)

bench: $(STAMP)
	for b in bench/*.py; do $(PY) $$b || exit 1; done

clean:
	rm -rf $(VENV) .pytest_cache build *.egg-info
