"""Packaging: a plain (non-editable) ``pip install .`` into a fresh virtual environment.

Checks that the installed distribution puts only ``chainvigil*`` entries at the top of
site-packages (nothing generic such as ``monitor`` or ``storage``), that the package data (the
screen's stylesheet) is installed, and that the public API imports from outside the repository.
Needs the package index for the dependencies (pip's cache makes repeats quick).
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent

pytestmark = pytest.mark.slow


def _run(args, cwd, timeout=900):
    env = {k: v for k, v in os.environ.items() if not k.startswith("PYTHON")}
    result = subprocess.run(args, cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)
    assert result.returncode == 0, f"{args}\n{result.stdout[-3000:]}\n{result.stderr[-3000:]}"
    return result


def test_plain_install_puts_only_chainvigil_at_the_top_of_site_packages(tmp_path):
    venv = tmp_path / "venv"
    _run([sys.executable, "-m", "venv", str(venv)], cwd=tmp_path)
    python = venv / "bin" / "python"
    _run([str(python), "-m", "pip", "install", "--quiet", str(REPO)], cwd=tmp_path)
    site = Path(_run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                     cwd=tmp_path).stdout.strip())
    records = list(site.glob("chainvigil-*.dist-info/RECORD"))
    assert len(records) == 1, sorted(p.name for p in site.iterdir())
    top = {line.split(",")[0].split("/")[0] for line in records[0].read_text().splitlines() if line}
    top.discard("..")  # the console script lives in bin/
    assert top and all(name.startswith("chainvigil") for name in top), top
    for generic in ("monitor", "storage", "tui", "simulated_chains"):
        assert not (site / generic).exists(), generic
    # Installed package data and the public API, imported from outside the repository.
    assert (site / "chainvigil" / "tui" / "app.tcss").is_file()
    out = _run([str(python), "-c", "import chainvigil; print(chainvigil.ChainWriter); "
                "print(chainvigil.__file__)"], cwd=tmp_path).stdout
    assert "ChainWriter" in out and str(site) in out and str(REPO) not in out
    _run([str(venv / "bin" / "chainvigil"), "--help"], cwd=tmp_path)
