# Each target sets itself up: .venv is created and the project installed on first use.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-stamp
OUT ?= demo-output

.PHONY: test demo bench lint clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip 'setuptools>=77'
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

lint: $(STAMP)
	$(BIN)/ruff check .

test: $(STAMP) lint
	$(BIN)/python -m pytest -n 2 --dist loadfile --no-loadscope-reorder --durations=15

demo: $(STAMP)
	$(BIN)/predictor demo $(OUT)

bench: $(STAMP)
	$(BIN)/python tests/benchmarks/run.py

clean:
	rm -rf $(VENV) .pytest_cache .ruff_cache
