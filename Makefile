# chainvigil: the two commands a newcomer needs, plus helpers for developers.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: test test-fast test-min demo bench soak venv clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

test: $(STAMP)
	$(BIN)/python -m pytest -q tests

# The inner loop: everything but the tests marked slow (processes, the demo, packaging).
test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -m "not slow" tests

# The declared minimum versions: a second venv with every dependency pinned to its floor
# (constraints-min.txt), then the fast suite.  A floor that stops working fails here.
MIN_VENV ?= .venv-min
test-min:
	test -x $(MIN_VENV)/bin/python || $(PYTHON) -m venv $(MIN_VENV)
	$(MIN_VENV)/bin/python -m pip install --quiet --upgrade pip
	$(MIN_VENV)/bin/python -m pip install --quiet '.[test]' -c constraints-min.txt
	$(MIN_VENV)/bin/python -m pip install --quiet --no-deps --force-reinstall .   # this tree's code
	$(MIN_VENV)/bin/python -m pytest -q -m "not slow" -p no:cacheprovider tests

demo: $(STAMP)
	$(BIN)/chainvigil demo

# Benchmarks print ratios measured side by side in one run; timings are never asserted in tests.
bench: $(STAMP)
	set -e; for script in bench/*.py; do echo "== $$script"; $(BIN)/python $$script; done

# Fifty SIGKILLs of the service while samplers write; checks that nothing is lost or counted twice.
soak: $(STAMP)
	$(BIN)/python tests/soak_kills.py

clean:
	rm -rf $(VENV) $(MIN_VENV) .pytest_cache build *.egg-info
