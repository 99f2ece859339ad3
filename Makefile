# Two entry points: `make demo` and `make test`. Both create .venv when missing.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test setup dot clean bench

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install -q --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/pip install -q -e '.[test]'
	touch $(STAMP)

setup: $(STAMP) dot

# graphviz's `dot` renders drawings; install Debian's package where we may.
dot:
	@if ! command -v dot >/dev/null 2>&1; then \
	  if [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
	    (apt-get install -y -q graphviz >/dev/null 2>&1 || \
	     (apt-get update -q >/dev/null 2>&1 && apt-get install -y -q graphviz >/dev/null 2>&1)) || \
	    echo "warning: could not install graphviz; drawings will be written as DOT only"; \
	  else \
	    echo "note: the 'dot' program is missing; install graphviz to render drawings"; \
	  fi; \
	fi

demo: setup
	$(BIN)/netbuild build --project examples/ropeway/project.toml --out build/demo

test: setup
	$(BIN)/python -m pytest -q

bench: setup
	$(BIN)/python bench/run.py

clean:
	rm -rf build .pytest_cache
