# Two commands do all set-up on a machine that has only python3:
#   make demo   run the whole job against the embedded fictional archive
#   make test   run every check (ruff, the import layers, mypy, pytest)
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,cluster]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/collector demo

test: $(STAMP)
	$(BIN)/ruff check collector sources demo_site tests bench
	$(BIN)/lint-imports
	$(BIN)/mypy
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	for f in bench/*.py; do $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) demo-collection .pytest_cache
