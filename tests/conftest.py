"""Fixtures shared by the test files (pytest finds them here by name)."""
from __future__ import annotations

import gc
import os
import shutil
import sys
from pathlib import Path

import pytest

import _tiers

# The suite writes bytecode into the tree's __pycache__ folders (gitignored) even where the
# environment says not to (PYTHONDONTWRITEBYTECODE): otherwise every run compiles the project and
# pytest rewrites the assertions of every test module again, about 4 s of each run.  Test modules
# and the project are imported after this file, so both are cached; subprocesses the tests start
# read the cached files too (the environment variable only stops writing).
sys.dont_write_bytecode = False


# The fast tier keeps its temporary folders on a memory file system when the machine has one with
# room (Linux /dev/shm): the stores, histories and chunk files the tests write are the same, but the
# fsyncs that make them durable cost nothing there (about a fifth of the tier's time on a disk).  The
# full suite, the CI command, stays on disk.  CHAINVIGIL_TESTS_ON_DISK=1 or --basetemp keeps it on disk.
MEMORY_FS = Path("/dev/shm")
MEMORY_FS_ROOM = 2 << 30


def _memory_basetemp() -> Path | None:
    if os.environ.get("CHAINVIGIL_TESTS_ON_DISK") or not MEMORY_FS.is_dir() or not os.access(MEMORY_FS, os.W_OK):
        return None
    try:
        stat = os.statvfs(MEMORY_FS)
    except OSError:
        return None
    if stat.f_bavail * stat.f_frsize < MEMORY_FS_ROOM:
        return None
    return MEMORY_FS / f"chainvigil-tests-{os.getuid()}-{os.getpid()}"


def pytest_configure(config):
    # The fast tier (-m "not slow") draws fewer hypothesis examples per property (tests/_tiers.py);
    # set before collection, when the test modules' @settings decorators are evaluated.
    _tiers.FAST = _tiers.deselects_slow(config.getoption("markexpr", ""))
    if _tiers.FAST and not config.option.basetemp and not hasattr(config, "workerinput"):
        config._chainvigil_memory_basetemp = _memory_basetemp()
        if config._chainvigil_memory_basetemp is not None:
            config.option.basetemp = str(config._chainvigil_memory_basetemp)


def pytest_unconfigure(config):
    memory = getattr(config, "_chainvigil_memory_basetemp", None)
    if memory is not None:
        shutil.rmtree(memory, ignore_errors=True)  # memory is not for keeping old runs in


def pytest_report_header(config):
    memory = getattr(config, "_chainvigil_memory_basetemp", None)
    return f"temporary folders in memory: {memory} (CHAINVIGIL_TESTS_ON_DISK=1 for disk)" if memory else None


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
