# rwls: every target creates or reuses the project venv in .venv.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo replay-demo test test-fast bench lint clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test,bench]'
	touch $(STAMP)

## demo: embedded broker + simulated plant + service; prints the URL (Ctrl-C stops)
demo: $(STAMP)
	$(VENV)/bin/rwls demo

## replay-demo: the offline path on the bundled demo history
replay-demo: $(STAMP)
	$(VENV)/bin/rwls replay examples/larkspur_sub7.csv --config examples/larkspur_sub7.toml

## test: every test layer (unit, property, reference, long runs, integration against MQTT and PostgreSQL on
## 127.0.0.1, the dashboard in headless Chromium)
test: $(STAMP)
	$(PY) -m pytest tests/unit tests/property tests/reference tests/integration tests/browser -q

## test-fast: the offline layers (no broker) without the long robustness runs
test-fast: $(STAMP)
	$(PY) -m pytest -q -m "not slow"

## bench: timing runs with printed figures (no timed asserts)
bench: $(STAMP)
	$(PY) -m pytest tests/benchmarks -q -s -m benchmark -p no:cacheprovider

## lint: ruff over everything; mypy over estimator/ (strict) and service/ (settings in pyproject.toml)
lint: $(STAMP)
	$(VENV)/bin/ruff check estimator service tests
	$(VENV)/bin/mypy
	$(VENV)/bin/mypy --strict estimator

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache
