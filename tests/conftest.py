"""Fixtures shared by the test files (pytest finds them here by name)."""
from __future__ import annotations

import pytest


@pytest.fixture
def root(tmp_path):
    """An empty folder to watch: the root a service reads run folders from."""
    r = tmp_path / "root"
    r.mkdir()
    return r
