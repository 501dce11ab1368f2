"""Fixtures shared by the test files (pytest finds them here by name)."""
from __future__ import annotations

import sys

import pytest

# The suite writes bytecode into the tree's __pycache__ folders (gitignored) even where the
# environment says not to (PYTHONDONTWRITEBYTECODE): otherwise every run compiles the project and
# pytest rewrites the assertions of every test module again, about 4 s of each run.  Test modules
# and the project are imported after this file, so both are cached; subprocesses the tests start
# read the cached files too (the environment variable only stops writing).
sys.dont_write_bytecode = False


@pytest.fixture
def root(tmp_path):
    """An empty folder to watch: the root a service reads run folders from."""
    r = tmp_path / "root"
    r.mkdir()
    return r
