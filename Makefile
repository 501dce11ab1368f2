# chainvigil: the two commands a newcomer needs, plus helpers for developers.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: test demo bench soak venv clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

test: $(STAMP)
	$(BIN)/python -m pytest -q tests

demo: $(STAMP)
	$(BIN)/chainvigil demo

# Benchmarks print ratios measured side by side in one run; timings are never asserted in tests.
bench: $(STAMP)
	set -e; for script in bench/*.py; do echo "== $$script"; $(BIN)/python $$script; done

# Fifty SIGKILLs of the service while samplers write; checks that nothing is lost or counted twice.
soak: $(STAMP)
	$(BIN)/python tests/soak_kills.py

clean:
	rm -rf $(VENV) .pytest_cache build *.egg-info
