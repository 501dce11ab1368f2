"""Atomic writes of small JSON files into a folder (run.json, REFITS.json): a reader never sees half
a file. Hidden temporary file in the same folder, fsync, rename over the name, fsync of the folder
so the rename itself survives a power loss."""
from __future__ import annotations

import json
import os

__all__ = ["write_json_atomic", "fsync_dir"]


def fsync_dir(path) -> None:
    """fsync a folder (makes a rename inside it durable); silently skipped where not supported."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_json_atomic(folder, name: str, obj) -> str:
    """Write ``obj`` as indented JSON (no NaN/inf) to ``folder/name`` atomically; create ``folder``
    if needed; return the path."""
    folder = os.fspath(folder)
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, name)
    tmp = os.path.join(folder, f".{name}.tmp")
    try:
        with open(tmp, "w", encoding="utf-8") as f:
            json.dump(obj, f, indent=2, allow_nan=False)
            f.write("\n")
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    fsync_dir(folder)
    return path
