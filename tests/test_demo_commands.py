"""The demo's closing lines print commands that work as printed, however chainvigil was started."""
from __future__ import annotations

import os
import shlex
import subprocess
import sys
from pathlib import Path

from chainvigil.demo import closing_lines, own_command

PROJECT = Path(__file__).resolve().parents[1]


def _script(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    script = folder / "chainvigil"
    script.write_text(f"#!{sys.executable}\nfrom chainvigil.cli import main\nraise SystemExit(main())\n")
    script.chmod(0o755)
    return script


def test_started_by_a_path_not_on_the_path_prints_that_full_path(tmp_path, monkeypatch):
    script = _script(tmp_path / "with space" / "bin")
    monkeypatch.setenv("PATH", "/usr/bin:/bin")
    command = own_command(str(script))
    assert shlex.split(command) == [str(script)]
    # relative, as `make demo` starts it (.venv/bin/chainvigil): printed as an absolute path
    monkeypatch.chdir(tmp_path / "with space")
    assert shlex.split(own_command("bin/chainvigil")) == [str(script)]
    proc = subprocess.run(shlex.split(command) + ["compare", "--help"], capture_output=True, text=True,
                          timeout=60, cwd=tmp_path)
    assert proc.returncode == 0 and "usage: chainvigil compare" in proc.stdout


def test_on_the_path_it_is_plain_chainvigil(tmp_path, monkeypatch):
    script = _script(tmp_path / "bin")
    monkeypatch.setenv("PATH", f"{script.parent}{os.pathsep}/usr/bin:/bin")
    assert own_command(str(script)) == "chainvigil"
    # another chainvigil first on the PATH: not the one that ran, so the full path is printed
    _script(tmp_path / "other")
    monkeypatch.setenv("PATH", f"{tmp_path / 'other'}{os.pathsep}{script.parent}")
    assert own_command(str(script)) == str(script)


def test_started_as_a_module_prints_the_interpreter(tmp_path):
    command = own_command(str(PROJECT / "monitor" / "cli.py"))
    assert shlex.split(command) == [sys.executable, "-m", "chainvigil.cli"]
    lines = closing_lines(tmp_path / "d d", tmp_path / "d d" / ".chainvigil", command)
    assert lines[0].startswith(f"the runs and their history stay in {tmp_path / 'd d'}")
    words = [shlex.split(line) for line in lines[1:]]
    assert [w[3] for w in words] == ["view", "compare", "report"]
    assert words[1][4] == str(tmp_path / "d d" / ".chainvigil")  # the quoted path survives the shell


def test_demo_and_cli_do_not_import_each_other():
    code = ("import sys, chainvigil.demo; assert 'chainvigil.cli' not in sys.modules, 'demo imports cli'\n"
            "import ast, pathlib, chainvigil.cli as c\n"
            "tree = ast.parse(pathlib.Path(c.__file__).read_text())\n"
            "top = [n for n in tree.body if isinstance(n, (ast.Import, ast.ImportFrom))]\n"
            "assert not any('demo' in (getattr(n, 'module', '') or '') for n in top), 'cli imports demo at load'\n")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
