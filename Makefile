# Two entry points, both bootstrap a virtualenv in .venv from this project's own files:
#   make demo   the main job end to end on the embedded defaults
#   make test   the whole test suite
VENV   ?= .venv
PY     := $(VENV)/bin/python
DEMUR  := $(VENV)/bin/demur
BUILD  ?= build/demo

.PHONY: demo test test-long bench system-deps clean

$(VENV)/.installed: pyproject.toml
	python3 -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[all]'
	touch $@

system-deps:
	bash deploy/system-deps.sh

demo: $(VENV)/.installed
	PATH="$(abspath $(VENV))/bin:$$PATH" bash deploy/demo.sh $(BUILD)

test: $(VENV)/.installed system-deps
	$(PY) -m pytest

test-long: $(VENV)/.installed system-deps
	$(PY) -m pytest -m long

bench: $(VENV)/.installed system-deps
	$(DEMUR) bench

clean:
	rm -rf build demur-data .pytest_cache
