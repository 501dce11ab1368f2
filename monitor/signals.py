"""Side effects when a run has enough draws: the stop signal file and the user's command.

:func:`write_signal_inside` writes ``ENOUGH.json`` into a run folder only while that folder is
still a real folder inside the watched root, checked at write time: every path component from the
root down is opened with ``O_DIRECTORY | O_NOFOLLOW`` (a component swapped for a symlink fails to
open), the file is written with ``dir_fd`` relative to the opened run folder and renamed into place
within it, so nothing is ever written outside the root even if a folder is replaced meanwhile.

:func:`run_on_enough` runs the user's ``--on-enough`` command without a shell: the command line is
split once with ``shlex`` from the user's own flag value, and every value that comes from input
(run name, folder, draws, the signal file) is passed as an environment variable, never pasted into
the command line:

``CHAINVIGIL_RUN``          the run's name (its folder name)
``CHAINVIGIL_FOLDER``       the run folder's path
``CHAINVIGIL_DRAWS``        draws in all (over chains)
``CHAINVIGIL_DRAWS_PER_CHAIN`` draws of the shortest chain
``CHAINVIGIL_ENOUGH_FILE``  path of the ENOUGH.json written (empty if none was written)
``CHAINVIGIL_STATE``        the service's state folder
"""
from __future__ import annotations

import json
import os
import shlex
import subprocess
from collections.abc import Mapping
from pathlib import Path

from chainvigil.rules import SIGNAL_FILE, finite_or_none

__all__ = ["write_signal_inside", "write_json_inside", "remove_inside", "signal_body", "parse_command",
           "enough_environment", "run_on_enough", "OutsideRoot"]


class OutsideRoot(OSError):
    """The run folder is no longer a real folder inside the root (e.g. replaced by a symlink)."""


def _jsonable(x):
    if isinstance(x, Mapping):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if hasattr(x, "item") and callable(x.item):  # numpy scalar
        x = x.item()
    if isinstance(x, float):
        return finite_or_none(x)
    return x


def signal_body(verdict: Mapping, draws, time) -> dict:
    """The content of ``ENOUGH.json``: ``{"enough": true, "draws", "time", "checks": [...]}``."""
    return {"enough": True, "draws": draws, "time": time,
            "checks": [{k: c.get(k) for k in ("name", "ok", "value", "target", "note")}
                       for c in verdict.get("checks", [])]}


def _open_inside(root: Path, folder: Path) -> int:
    """A file descriptor of ``folder`` opened component by component from ``root`` without following
    any symlink; OutsideRoot when the folder is not below the root or a component is not a folder."""
    root = Path(os.path.abspath(root))
    folder = Path(os.path.abspath(folder))
    try:
        parts = folder.relative_to(root).parts
    except ValueError:
        raise OutsideRoot(f"{folder}: not inside the watched root {root}") from None
    if not parts or any(p in ("..", ".") for p in parts):
        raise OutsideRoot(f"{folder}: not a run folder inside {root}")
    flags = os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW
    fd = os.open(root, os.O_RDONLY | os.O_DIRECTORY)
    try:
        for part in parts:
            try:
                child = os.open(part, flags, dir_fd=fd)
            except OSError as err:
                raise OutsideRoot(f"{folder}: '{part}' is no longer a folder inside the root ({err.strerror})") \
                    from None
            os.close(fd)
            fd = child
        return fd
    except BaseException:
        os.close(fd)
        raise


def write_json_inside(root, run_folder, name: str, obj) -> Path:
    """Write ``<run_folder>/<name>`` (JSON) atomically, only while the folder is inside ``root``.

    Temp file in the opened run folder (``dir_fd``), fsync, rename within the folder, fsync of the
    folder.  Raises OutsideRoot when the folder left the root (or became a symlink), OSError for
    other write failures, ValueError for a ``name`` that is not a plain file name.
    """
    if not name or "/" in name or name in (".", ".."):
        raise ValueError(f"{name!r}: not a plain file name")
    text = json.dumps(_jsonable(obj), indent=2, allow_nan=False) + "\n"
    dir_fd = _open_inside(Path(root), Path(run_folder))
    tmp = f".{name}.{os.getpid()}.tmp"
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_NOFOLLOW, 0o644, dir_fd=dir_fd)
        try:
            os.write(fd, text.encode("utf-8"))
            os.fsync(fd)
        finally:
            os.close(fd)
        try:
            os.rename(tmp, name, src_dir_fd=dir_fd, dst_dir_fd=dir_fd)
        except BaseException:
            try:
                os.unlink(tmp, dir_fd=dir_fd)
            except OSError:
                pass
            raise
        try:
            os.fsync(dir_fd)
        except OSError:
            pass
    finally:
        os.close(dir_fd)
    return Path(run_folder) / name


def remove_inside(root, run_folder, name: str) -> bool:
    """Remove ``<run_folder>/<name>`` only while the folder is inside ``root`` (OutsideRoot otherwise);
    True when there was such a file."""
    if not name or "/" in name or name in (".", ".."):
        raise ValueError(f"{name!r}: not a plain file name")
    dir_fd = _open_inside(Path(root), Path(run_folder))
    try:
        os.unlink(name, dir_fd=dir_fd)
        return True
    except FileNotFoundError:
        return False
    finally:
        os.close(dir_fd)


def write_signal_inside(root, run_folder, verdict: Mapping, draws, time) -> Path:
    """Write ``<run_folder>/ENOUGH.json`` atomically, only while the folder is inside ``root``
    (:func:`write_json_inside`).  Raises ValueError when the verdict is not ``enough``."""
    if not verdict.get("enough"):
        raise ValueError(f"{run_folder}: verdict is not 'enough'; no stop signal written")
    return write_json_inside(root, run_folder, SIGNAL_FILE, signal_body(verdict, draws, time))


def parse_command(command: str, flag: str = "--on-enough") -> list[str]:
    """The user's ``--on-enough`` (or ``--on-refits``) value split once, shell-like (``shlex.split``);
    ValueError if empty or badly quoted."""
    try:
        argv = shlex.split(command)
    except ValueError as err:
        raise ValueError(f"{flag} {command!r}: {err}") from None
    if not argv:
        raise ValueError(f"{flag}: empty command")
    return argv


def enough_environment(*, run: str, folder, draws, draws_per_chain, enough_file, state_dir) -> dict:
    """The environment of the ``--on-enough`` command: this process's, plus the CHAINVIGIL_* values."""
    env = dict(os.environ)
    env.update({
        "CHAINVIGIL_RUN": str(run),
        "CHAINVIGIL_FOLDER": str(folder),
        "CHAINVIGIL_DRAWS": str(draws),
        "CHAINVIGIL_DRAWS_PER_CHAIN": str(draws_per_chain),
        "CHAINVIGIL_ENOUGH_FILE": "" if enough_file is None else str(enough_file),
        "CHAINVIGIL_STATE": str(state_dir),
    })
    return env


def run_on_enough(argv: list[str], env: dict, cwd) -> subprocess.Popen:
    """Start the command (no shell, no input, working folder ``cwd``); returns the process."""
    return subprocess.Popen(list(argv), shell=False, cwd=cwd, env=env, stdin=subprocess.DEVNULL)
