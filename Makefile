# rescore: set-up, demo, tests and benchmarks. Every target creates .venv when missing.
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
BIN := $(VENV)/bin

.PHONY: demo test check lint typecheck unit bench fuzz demo-data clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install -q --upgrade pip

$(VENV)/.installed: pyproject.toml | $(PY)
	$(PY) -m pip install -q -e .
	touch $@

$(VENV)/.installed-dev: pyproject.toml | $(PY)
	$(PY) -m pip install -q -e '.[dev]'
	touch $@ $(VENV)/.installed

demo: $(VENV)/.installed
	$(BIN)/rescore demo --out demo-out

lint: $(VENV)/.installed-dev
	$(BIN)/ruff check rescore tests scripts
	$(BIN)/mypy rescore

unit: $(VENV)/.installed-dev
	$(PY) -m pytest

test: lint unit

# The fast loop between submissions: lint, types and every test not marked slow.
check: lint
	$(PY) -m pytest -m 'not slow'

bench: $(VENV)/.installed-dev
	$(PY) scripts/bench

fuzz: $(VENV)/.installed-dev
	RESCORE_FUZZ_EXAMPLES=20000 $(PY) -m pytest tests/test_fuzz.py

demo-data: $(VENV)/.installed
	$(PY) scripts/make_demo_data.py --out fixtures/demo
	$(PY) scripts/make_kana_demo_data.py --out rescore/demo_data/kana

clean:
	rm -rf $(VENV) demo-out .pytest_cache .mypy_cache .ruff_cache
