PY := .venv/bin/python
DEMO_OUT ?= demo_out

.PHONY: setup demo test bench clean

setup: .venv/.installed

.venv/.installed: pyproject.toml
	python3 -m venv .venv
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	touch $@

demo: setup
	.venv/bin/fibers demo --out $(DEMO_OUT)

test: setup
	$(PY) -m pytest

bench: setup
	$(PY) bench/run.py

clean:
	rm -rf .venv $(DEMO_OUT) *.egg-info
