# chainvigil: the two commands a newcomer needs, plus helpers for developers.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: test demo bench venv clean

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

bench: $(STAMP)
	$(BIN)/python bench/streaming_scores.py

clean:
	rm -rf $(VENV) .pytest_cache build *.egg-info
