"""The README's commands as a new user runs them: the package installed (not editable) into a fresh
virtual environment with plain pip, then every command of the README's marked block run as printed
by a shell, from an empty folder, with only that environment's ``bin`` added to the PATH.

``chainvigil view`` is skipped: it needs a terminal (the screen is tested through Textual's pilot in
test_tui.py)."""
from __future__ import annotations

import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

PROJECT = Path(__file__).resolve().parents[1]
MARKER = "<!-- commands-run-by-tests -->"
NEEDS_A_TERMINAL = ("chainvigil view",)


def readme_block() -> list[str]:
    """The command lines of the fenced block right after the marker in README.md."""
    text = (PROJECT / "README.md").read_text(encoding="utf-8")
    assert MARKER in text, "README.md lost its marked block of commands"
    after = text.split(MARKER, 1)[1]
    m = re.match(r"\s*```[a-z]*\n(.*?)\n```", after, flags=re.S)
    assert m, "the marker must stand right before a fenced code block"
    return [line for line in m.group(1).splitlines() if line.strip() and not line.lstrip().startswith("#")]


def test_readme_block_is_found_and_covers_the_daily_commands():
    lines = readme_block()
    for command in ("--help", "demo", "score", "history", "compare", "report"):
        assert any(line.startswith(f"chainvigil {command}") for line in lines), command


@pytest.mark.slow
def test_readme_commands_run_as_printed_in_a_fresh_install(tmp_path):
    # a copy of the sources, so that building does not leave build/ or *.egg-info in the work tree
    source = tmp_path / "chainvigil-src"
    shutil.copytree(PROJECT, source, ignore=shutil.ignore_patterns(
        ".venv", ".git", "build", "*.egg-info", "__pycache__", ".pytest_cache", ".hypothesis"))
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True, timeout=300)
    bindir = venv / "bin"
    # the README's install line: <venv>/bin/pip install '.[report]' from the source folder
    install = subprocess.run([str(bindir / "pip"), "install", "--quiet", ".[report]"], cwd=source,
                             capture_output=True, text=True, timeout=1200)
    assert install.returncode == 0, install.stderr[-3000:]
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    env["PATH"] = f"{bindir}{os.pathsep}{env.get('PATH', '')}"
    assert shutil.which("chainvigil", path=env["PATH"]) == str(bindir / "chainvigil")
    session = tmp_path / "session"  # an empty folder, as in the README
    session.mkdir()
    outputs = {}
    for line in readme_block():
        if line.startswith(NEEDS_A_TERMINAL):
            continue
        proc = subprocess.run(["bash", "-c", line], cwd=session, env=env, capture_output=True, text=True,
                              timeout=600)
        assert proc.returncode == 0, f"{line}\n{proc.stdout[-2000:]}\n{proc.stderr[-3000:]}"
        assert "Traceback" not in proc.stderr, f"{line}\n{proc.stderr}"
        outputs[line] = proc.stdout
    # the installed package is the one that ran, not the work tree's
    where = subprocess.run([str(bindir / "python"), "-c", "import chainvigil; print(chainvigil.__file__)"],
                           capture_output=True, text=True, env=env, cwd=session)
    assert str(venv) in where.stdout and str(PROJECT) not in where.stdout
    demo = next(out for line, out in outputs.items() if line.startswith("chainvigil demo"))
    assert "final verdicts:" in demo
    # the demo's closing lines name commands that work as printed: here plain `chainvigil` is on the PATH
    review = [line.strip() for line in demo.splitlines() if line.startswith("  chainvigil ")]
    assert [shlex.split(r)[1] for r in review] == ["view", "compare", "report"]
    for command in review[1:]:
        proc = subprocess.run(["bash", "-c", command], cwd=session, env=env, capture_output=True, text=True,
                              timeout=300)
        assert proc.returncode == 0, f"{command}\n{proc.stderr}"
    compare = next(out for line, out in outputs.items() if line == "chainvigil compare cv-demo/.chainvigil")
    assert " vs " in compare
    assert (session / "cv-demo" / "report.html").stat().st_size > 10_000
    history = next(out for line, out in outputs.items() if "history" in line)
    assert history.splitlines()[0].startswith("run,seq,time_iso,time,")
