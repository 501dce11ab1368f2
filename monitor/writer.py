"""Writing draws into a run folder, for samplers written in Python (docs/input-format.md).

Example::

    from chainvigil.writer import ChainWriter, write_run_info, enough_signalled

    write_run_info(run_dir, title="Poisson regression", dataset="counts-2024", n_params=3)
    with ChainWriter(run_dir, "chain1", param_names=("alpha", "beta", "sigma")) as out:
        for block_loglik, block_params in sampler:          # (draws, n), (draws, 3)
            out.append(block_loglik, block_params)
            if enough_signalled(run_dir):
                break

NPZ chunks are written to a hidden temporary name in the chain's folder, flushed to disk, then renamed
to ``<seq:08d>.npz`` (an atomic rename on one file system), so a reader never sees half a chunk. CSV
appends are whole lines in one write, so a reader never takes a partial line (it waits for the newline).
Floats are written with Python's ``repr``, the shortest text that reads back as the same float.
"""

from __future__ import annotations

import os
import re
from typing import Sequence

import numpy as np

from chainvigil.readers import (RUN_INFO_NAME, STOP_SIGNAL_NAME, load_npz_chunk, parse_header,
                             validate_run_info)
from chainvigil.atomic import fsync_dir, write_json_atomic
from chainvigil.problems import InputProblem
from chainvigil.rules import RUN_INFO_FIELDS as _RUN_INFO_FIELDS

__all__ = ["ChainWriter", "write_run_info", "enough_signalled"]

_CHAIN_RE = re.compile(r"[A-Za-z0-9_\-][A-Za-z0-9_.\-]*")
_CHUNK_RE = re.compile(r"(\d{8})\.npz")


def _check_chain(chain: str) -> str:
    if not isinstance(chain, str) or not _CHAIN_RE.fullmatch(chain) or chain.endswith((".csv", ".npz", ".tmp")):
        raise ValueError(f"chain name {chain!r} must be letters, digits, '_', '-' or '.', not start with "
                         "'.', and not end in .csv/.npz/.tmp")
    return chain


def _check_param_names(names: Sequence[str]) -> tuple[str, ...]:
    if isinstance(names, str):
        raise ValueError(f"param_names must be a sequence of names, not the string {names!r}")
    names = tuple(names)
    for nm in names:
        if not isinstance(nm, str) or not nm or nm != nm.strip():
            raise ValueError(f"parameter name {nm!r} must be a non-empty string without surrounding spaces")
        if any(c in nm for c in ',"\n\r'):
            raise ValueError(f"parameter name {nm!r} may not contain commas, quotes or line breaks")
        if nm == "draw" or nm.startswith("loglik["):
            raise ValueError(f"parameter name {nm!r} is reserved ('draw' and 'loglik[i]' are the chain's own)")
    if len(set(names)) != len(names):
        dup = sorted({nm for nm in names if names.count(nm) > 1})
        raise ValueError(f"parameter names repeat: {', '.join(dup)}")
    return names


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        view = view[written:]


class ChainWriter:
    """Append blocks of draws to one chain of a run folder.

    Parameters
    ----------
    run_dir : path-like
        The run folder (created if missing).
    chain : str
        Chain name: the CSV file stem or the chunk folder name.
    param_names : sequence of str
        Names of the parameter columns (may be empty).
    fmt : {"npz", "csv"}
    fsync : bool
        Flush every append to disk before returning (NPZ chunks are always synced before the rename).

    Reopening an existing chain continues it: NPZ chunk numbers and draw numbers carry on, a CSV file
    keeps its header (which must match) and loses only an incomplete last line.
    """

    def __init__(self, run_dir: str | os.PathLike, chain: str, param_names: Sequence[str] = (),
                 fmt: str = "npz", *, fsync: bool = False):
        if fmt not in ("npz", "csv"):
            raise ValueError(f"fmt must be 'npz' or 'csv', not {fmt!r}")
        self.run_dir = os.fspath(run_dir)
        self.chain = _check_chain(chain)
        self.param_names = _check_param_names(param_names)
        self.fmt = fmt
        self.fsync = fsync
        self.n: int | None = None
        self.next_draw = 1
        self.draws_written = 0
        self._closed = False
        self._fd: int | None = None
        self._header_written = False
        os.makedirs(self.run_dir, exist_ok=True)
        if fmt == "csv":
            self.path = os.path.join(self.run_dir, chain + ".csv")
            self._open_csv()
        else:
            self.path = os.path.join(self.run_dir, chain)
            self._open_npz()

    # ---------------------------------------------------------------------------------------------
    # reopening

    def _open_csv(self) -> None:
        self._fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        size = os.fstat(self._fd).st_size
        if size == 0:
            return
        tail, tail_start = self._tail(size)
        last_nl = tail.rfind(b"\n")
        if last_nl < 0 and tail_start == 0:
            os.ftruncate(self._fd, 0)  # not even a complete header: start again
            return
        complete = tail_start + last_nl + 1
        if complete < size:
            os.ftruncate(self._fd, complete)  # an interrupted append: drop the partial line
        with open(self.path, "rb") as f:
            header_line = b""
            for line in f:
                if line.strip() and not line.startswith(b"#"):
                    header_line = line
                    break
        try:
            header = parse_header(header_line, self.path)
        except InputProblem as exc:
            os.close(self._fd)
            raise ValueError(f"cannot continue {self.path}: {exc.problem}") from None
        if header.draw_col != 0 or header.param_names != self.param_names or \
                header.param_cols != tuple(range(1, 1 + len(self.param_names))):
            os.close(self._fd)
            raise ValueError(f"cannot continue {self.path}: its header {header.line[:80]!r} is not "
                             f"draw,{','.join(self.param_names)},loglik[1..n]")
        self.n = header.n
        self._header_written = True
        lines = tail[: last_nl + 1].splitlines()
        for line in reversed(lines):
            if line.strip() and not line.startswith(b"#") and line.rstrip(b"\r\n") != header_line.rstrip(b"\r\n"):
                try:
                    self.next_draw = int(line.split(b",", 1)[0]) + 1
                except ValueError:
                    pass
                break

    def _tail(self, size: int) -> tuple[bytes, int]:
        """The last complete line(s) of the file: read backwards until two newlines are seen."""
        block = 1 << 16
        start = size
        data = b""
        while start > 0:
            start = max(0, start - block)
            os.lseek(self._fd, start, os.SEEK_SET)
            data = os.read(self._fd, size - start)
            if data.count(b"\n") >= 2 or start == 0:
                break
            block *= 4
        return data, start

    def _open_npz(self) -> None:
        os.makedirs(self.path, exist_ok=True)
        chunks = []
        for name in os.listdir(self.path):
            if name.startswith(".") and name.endswith(".npz.tmp"):
                try:
                    os.remove(os.path.join(self.path, name))  # left by an interrupted append
                except OSError:
                    pass
            m = _CHUNK_RE.fullmatch(name)
            if m:
                chunks.append((int(m.group(1)), name))
        chunks.sort()
        self._seq = chunks[-1][0] + 1 if chunks else 0
        if chunks:
            last = load_npz_chunk(os.path.join(self.path, chunks[-1][1]))
            if last.param_names != self.param_names and (last.params.shape[1] or self.param_names):
                raise ValueError(f"cannot continue {self.path}: its chunks have parameters "
                                 f"{list(last.param_names)}, not {list(self.param_names)}")
            self.n = last.n
            if last.draw_ids is not None and last.draws:
                self.next_draw = int(last.draw_ids[-1]) + 1
            else:
                total = sum(load_npz_chunk(os.path.join(self.path, nm)).draws for _s, nm in chunks)
                self.next_draw = total + 1

    # ---------------------------------------------------------------------------------------------

    def append(self, loglik, params=None, draw_ids=None) -> int:
        """Append a block of draws; returns the number of draws written.

        ``loglik``: (draws, n) numbers (n fixed by the first append); ``params``: (draws, p) with
        p = len(param_names), required when there are parameter names; ``draw_ids``: (draws,) strictly
        increasing integers after the last one written (default: continue the count, from 1).
        NaN and ±inf are written as they are (the monitor reports them). Raises ValueError.
        """
        if self._closed:
            raise ValueError(f"the writer for {self.path} is closed")
        ll = np.asarray(loglik)
        if ll.ndim != 2:
            raise ValueError(f"loglik must be 2-D (draws, n); got shape {ll.shape}")
        if ll.dtype.kind not in "fiu":
            raise ValueError(f"loglik must hold numbers; got dtype {ll.dtype}")
        draws, n = ll.shape
        if n == 0:
            raise ValueError("loglik has no observations (shape (draws, 0))")
        if self.n is not None and n != self.n:
            raise ValueError(f"loglik has {n} observations; chain {self.chain!r} has {self.n}")
        p = len(self.param_names)
        if params is None:
            if p:
                raise ValueError(f"params (draws, {p}) are required: the writer has parameter names "
                                 f"{list(self.param_names)}")
            pa = np.empty((draws, 0))
        else:
            pa = np.asarray(params)
            if pa.dtype.kind not in "fiub":
                raise ValueError(f"params must hold numbers; got dtype {pa.dtype}")
            if pa.ndim == 1 and p == 1:
                pa = pa[:, None]
            if pa.shape != (draws, p):
                raise ValueError(f"params has shape {pa.shape}; expected ({draws}, {p}) for parameter "
                                 f"names {list(self.param_names)}")
        if draw_ids is None:
            ids = np.arange(self.next_draw, self.next_draw + draws, dtype=np.int64)
        else:
            ids = np.asarray(draw_ids)
            if ids.shape != (draws,) or ids.dtype.kind not in "iu":
                raise ValueError(f"draw_ids must be {draws} integers; got shape {ids.shape}, dtype {ids.dtype}")
            ids = ids.astype(np.int64)
            if draws and (ids[0] < self.next_draw or np.any(np.diff(ids) <= 0)):
                raise ValueError(f"draw_ids must increase strictly, starting at {self.next_draw} or later")
        if draws == 0:
            self.n = n
            return 0
        ll = ll.astype(np.float64, copy=False)
        pa = pa.astype(np.float64, copy=False)
        if self.fmt == "csv":
            self._append_csv(ll, pa, ids)
        else:
            self._append_npz(ll, pa, ids)
        self.n = n
        self.next_draw = int(ids[-1]) + 1
        self.draws_written += draws
        return draws

    def _append_csv(self, ll: np.ndarray, pa: np.ndarray, ids: np.ndarray) -> None:
        parts = []
        if not self._header_written:
            cols = ["draw", *self.param_names, *(f"loglik[{i}]" for i in range(1, ll.shape[1] + 1))]
            parts.append(",".join(cols) + "\n")
        rows = np.hstack([pa, ll]).tolist()
        for d, row in zip(ids.tolist(), rows):
            parts.append(f"{d},{','.join(map(repr, row))}\n")
        os.lseek(self._fd, 0, os.SEEK_END)
        _write_all(self._fd, "".join(parts).encode("ascii"))
        self._header_written = True
        if self.fsync:
            os.fsync(self._fd)

    def _append_npz(self, ll: np.ndarray, pa: np.ndarray, ids: np.ndarray) -> None:
        name = f"{self._seq:08d}.npz"
        tmp = os.path.join(self.path, f".{name}.tmp")
        arrays = {"loglik": ll, "draw": ids}
        if self.param_names:
            arrays["params"] = pa
            arrays["param_names"] = np.array(self.param_names, dtype=str)
        with open(tmp, "wb") as f:
            np.savez(f, **arrays)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, os.path.join(self.path, name))
        if self.fsync:
            fsync_dir(self.path)
        self._seq += 1

    def close(self) -> None:
        """Close the chain (idempotent); further appends raise ValueError."""
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        self._closed = True

    def __enter__(self) -> "ChainWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __del__(self):
        try:
            self.close()
        except Exception:
            pass


def write_run_info(run_dir: str | os.PathLike, **fields) -> str:
    """Write ``<run_dir>/run.json`` atomically (hidden temporary file, fsync, rename); returns its path.

    Fields (docs/input-format.md): ``title`` str, ``dataset`` str, ``observation_labels`` list of str,
    ``n_params`` int, ``point_loglik`` float, ``targets`` dict. Unknown or wrongly typed fields raise
    ValueError.
    """
    unknown = sorted(set(fields) - set(_RUN_INFO_FIELDS))
    if unknown:
        raise ValueError(f"unknown run.json fields {unknown}; known: {list(_RUN_INFO_FIELDS)}")
    if "observation_labels" in fields and not isinstance(fields["observation_labels"], str):
        fields["observation_labels"] = list(fields["observation_labels"])
    for key in ("n_params",):
        if isinstance(fields.get(key), np.integer):
            fields[key] = int(fields[key])
    if isinstance(fields.get("point_loglik"), np.floating):
        fields["point_loglik"] = float(fields["point_loglik"])
    info = validate_run_info(fields)
    return write_json_atomic(run_dir, RUN_INFO_NAME, info)


def enough_signalled(run_dir: str | os.PathLike) -> bool:
    """True once the monitor has written the stop signal (``ENOUGH.json``) into the run folder."""
    return os.path.exists(os.path.join(os.fspath(run_dir), STOP_SIGNAL_NAME))


# --------------------------------------------------------------------------------------------------
# refits: what a sampler loop needs to answer a REFITS.json request (chainvigil.refits)

__all__ += ["read_refit_request", "write_refit_info", "pending_refits"]


def read_refit_request(run_dir: str | os.PathLike) -> dict | None:
    """The refit request the monitor wrote into ``run_dir`` (``REFITS.json``), checked; None if none.

    ``run_dir`` may also be the path of the REFITS.json file itself. The request is plain JSON: its
    ``refits`` list says, for each refit, its ``folder`` (beside the run), the ``held_out``
    observations (1-based) and, for K-fold, the ``fold``. Raises ValueError naming the file for a
    request that is not valid JSON or not a valid request.
    """
    from chainvigil.refits import read_refit_request as _read

    try:
        return _read(run_dir)
    except InputProblem as exc:
        raise ValueError(str(exc)) from None


def write_refit_info(refit_dir: str | os.PathLike, refit_of: str, held_out, fold: int | None = None,
                     **fields) -> str:
    """Write the ``run.json`` of a refit folder atomically; returns its path.

    Marks ``refit_dir`` as a refit of run ``refit_of`` that was fitted without the observations
    ``held_out`` (1-based, distinct; the refit's chains write log p(y_i | theta) of exactly these, in
    this order, as their log-likelihood columns), as fold ``fold`` of a K-fold plan when given.
    ``fields`` are the ordinary run.json fields of :func:`write_run_info` except ``dataset`` (a refit
    is scored with the run it belongs to, never compared on its own). Raises ValueError.
    """
    from chainvigil.refits import validate_refit_info

    if "dataset" in fields:
        raise ValueError("a refit has no 'dataset' of its own: it is scored with the run it refits")
    unknown = sorted(set(fields) - set(_RUN_INFO_FIELDS))
    if unknown:
        raise ValueError(f"unknown run.json fields {unknown}; known: {list(_RUN_INFO_FIELDS)}")
    held = [int(i) if isinstance(i, np.integer) else i for i in (held_out if not isinstance(held_out, str) else [held_out])]
    if isinstance(fold, np.integer):
        fold = int(fold)
    refit = validate_refit_info({"refit_of": refit_of, "held_out": held,
                                 **({"fold": fold} if fold is not None else {})})
    if "observation_labels" in fields and not isinstance(fields["observation_labels"], str):
        fields["observation_labels"] = list(fields["observation_labels"])
    if isinstance(fields.get("n_params"), np.integer):
        fields["n_params"] = int(fields["n_params"])
    if isinstance(fields.get("point_loglik"), np.floating):
        fields["point_loglik"] = float(fields["point_loglik"])
    info = validate_run_info(fields)
    labels = info.get("observation_labels")
    if labels is not None and len(labels) != len(held):
        raise ValueError(f"{len(labels)} observation labels for {len(held)} held-out observations")
    info = {**{k: v for k, v in refit.items() if v is not None}, **info}
    return write_json_atomic(refit_dir, RUN_INFO_NAME, info)


def pending_refits(run_dir: str | os.PathLike) -> list:
    """The refits the request in ``run_dir`` asks for whose folder does not exist yet.

    Each is a :class:`chainvigil.refits.RefitJob` with ``folder`` (beside the run), ``refit_of``,
    ``held_out`` (1-based, in column order), ``held_out0`` (0-based) and ``fold`` (None for exact
    LOO). A refit loop can be started again: folders already begun are not returned twice.
    Raises ValueError for an invalid request.
    """
    from chainvigil.refits import refit_jobs

    request = read_refit_request(run_dir)
    if request is None:
        return []
    return [job for job in refit_jobs(run_dir, request) if not os.path.exists(job.folder)]
