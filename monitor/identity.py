"""Identity of input files: is this still the file whose draws were taken?

A sampler that is restarted may write a chain file again under the same name; a copy tool may put
a chunk in place twice; a file may be cut short and grow again.  Draws of two sampler runs must
never be mixed in one chain, so the service records, with each commit, what it read
(``chainvigil.storage.history``, table ``sources``) and checks it before reading on.

CSV chain (appended in place): the device and inode, and SHA-256 digests of the first and of the
last up to ``HEAD_BYTES`` bytes of the part already read (``head`` covers the header line and the
first draws; ``tail`` the lines just before the read position).  The file is another one when it is
shorter than the part read or either digest differs (a restarted sampler that wrote the same header
and at least as many bytes shows up in ``tail``; a file that shrank and grew again too).  The bytes
decide, not the inode: a file replaced by a copy holding the same bytes (a copy tool, a whole-file
re-dump through a rename) is followed on; counting its draws again would double them.

NPZ chunk (written once, by atomic rename): its ``stat`` stamp (device, inode, size, mtime) and a
digest of its zip directory (member names, sizes and CRC-32s; the reader checks every member it
decompresses against its CRC-32, so the digest binds the data read).  A chunk whose stamp changed
is digested again; a different digest means new content.

Pure file inspection: no history, no store.
"""
from __future__ import annotations

import hashlib
import os
import zipfile

from chainvigil.problems import InputProblem
from chainvigil.readers import open_regular

__all__ = ["HEAD_BYTES", "csv_identity", "csv_change", "chunk_stamp", "chunk_identity",
           "stamp_of"]

HEAD_BYTES = 4096


def _digest(f, start: int, stop: int) -> str:
    f.seek(start)
    data = f.read(stop - start)
    if len(data) != stop - start:
        raise EOFError(f"the file ends at byte {start + len(data)}, before byte {stop}")
    return hashlib.sha256(data).hexdigest()


def csv_identity(path, offset: int, origin: str) -> dict:
    """The identity of a CSV chain file whose first ``offset`` bytes were read.

    Returns the ``sources`` fields ``origin, dev, ino, size`` (= ``offset``), ``mtime_ns``, ``head``
    (digest of bytes ``[0, min(offset, HEAD_BYTES))``) and ``tail`` (digest of bytes
    ``[max(0, offset - HEAD_BYTES), offset)``).  Raises ``InputProblem``/``OSError``/``EOFError``
    when the file cannot be read that far.
    """
    with open_regular(path, "CSV chain file") as f:
        st = os.fstat(f.fileno())
        return {"origin": origin, "dev": st.st_dev, "ino": st.st_ino, "size": int(offset),
                "mtime_ns": st.st_mtime_ns, "head": _digest(f, 0, min(offset, HEAD_BYTES)),
                "tail": _digest(f, max(0, offset - HEAD_BYTES), offset)}


def csv_change(recorded: dict, path) -> str | None:
    """Why the CSV file at ``path`` is no longer the one ``recorded`` describes, or None.

    ``recorded`` holds the fields of :func:`csv_identity`.  Raises ``InputProblem``/``OSError`` when
    the file cannot be opened (the reader reports that itself).
    """
    offset = int(recorded["size"])
    with open_regular(path, "CSV chain file") as f:
        st = os.fstat(f.fileno())
        replaced = (st.st_dev, st.st_ino) != (recorded.get("dev"), recorded.get("ino"))
        again = " (another file now has its name)" if replaced else ""
        if st.st_size < offset:
            return f"is now {st.st_size} bytes, shorter than the {offset} bytes already read{again}"
        if _digest(f, 0, min(offset, HEAD_BYTES)) != recorded.get("head"):
            return f"its first bytes (header and first lines) changed{again}"
        if _digest(f, max(0, offset - HEAD_BYTES), offset) != recorded.get("tail"):
            return f"the lines before byte {offset} (already read) changed{again}"
    # A new inode holding the same bytes where they were read (a copy put in place by rename, a
    # whole-file re-dump) is the same content: followed on, never read twice.
    return None


def chunk_stamp(path) -> tuple | None:
    """``(dev, ino, size, mtime_ns)`` of a chunk file, None when it is gone."""
    try:
        st = os.stat(path, follow_symlinks=False)
    except OSError:
        return None
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def stamp_of(identity: dict) -> tuple:
    """The ``chunk_stamp`` recorded in an identity."""
    return (identity.get("dev"), identity.get("ino"), identity.get("size"), identity.get("mtime_ns"))


def chunk_identity(path, origin: str) -> dict:
    """The identity of an NPZ chunk: its stamp and the digest of its zip directory.

    Raises ``InputProblem`` (not a regular file, unreadable, not a zip archive) or ``OSError``.
    """
    with open_regular(path, "chunk file") as f:
        st = os.fstat(f.fileno())
        try:
            with zipfile.ZipFile(f) as zf:
                members = sorted((i.filename, i.CRC, i.file_size, i.compress_size) for i in zf.infolist())
        except (zipfile.BadZipFile, EOFError, ValueError) as err:
            raise InputProblem(path, f"the NPZ archive is incomplete or damaged ({err})",
                               "truncated_npz") from None
    digest = hashlib.sha256(repr(members).encode()).hexdigest()
    return {"origin": origin, "dev": st.st_dev, "ino": st.st_ino, "size": st.st_size,
            "mtime_ns": st.st_mtime_ns, "digest": digest}
