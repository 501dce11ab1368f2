"""Fixtures shared by the test files (pytest finds them here by name)."""
from __future__ import annotations

import gc
import sys

import pytest

import _tiers

# The suite writes bytecode into the tree's __pycache__ folders (gitignored) even where the
# environment says not to (PYTHONDONTWRITEBYTECODE): otherwise every run compiles the project and
# pytest rewrites the assertions of every test module again, about 4 s of each run.  Test modules
# and the project are imported after this file, so both are cached; subprocesses the tests start
# read the cached files too (the environment variable only stops writing).
sys.dont_write_bytecode = False


def pytest_configure(config):
    # The fast tier (-m "not slow") draws fewer hypothesis examples per property (tests/_tiers.py);
    # set before collection, when the test modules' @settings decorators are evaluated.
    _tiers.FAST = _tiers.deselects_slow(config.getoption("markexpr", ""))


def pytest_collection_finish(session):
    # Everything imported and collected so far (numpy, scipy, zarr, textual, the test items) lives
    # for the whole session: moved out of the collector's generations, it is not walked again by
    # every full collection the tests trigger (each took about 0.1 s on this heap).
    gc.freeze()


@pytest.fixture
def root(tmp_path):
    """An empty folder to watch: the root a service reads run folders from."""
    r = tmp_path / "root"
    r.mkdir()
    return r
