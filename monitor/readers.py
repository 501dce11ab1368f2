"""Readers for run folders (the input contract, docs/input-format.md).

A watched root holds one folder per run::

    ROOT/<run>/run.json          optional description of the run (read_run_info)
    ROOT/<run>/<chain>.csv       append-only text, one header line then one line per draw (CsvChainReader)
    ROOT/<run>/<chain>/*.npz     chunk files made visible by atomic rename (load_npz_chunk, pending_chunks)

Every reader hands back a :class:`Batch` of whole draws: ``loglik`` shaped ``(draws, n)``, ``params``
shaped ``(draws, p)``, optional draw numbers, and a list of :class:`~chainvigil.problems.InputProblem` for
whatever was skipped or flagged. A problem that makes the whole file unusable is raised instead. Nothing
here writes anything; NPZ files are always opened with ``allow_pickle=False`` and object arrays are
refused from their header before any data is read.
"""

from __future__ import annotations

import io
import json
import math
import os
import re
import zipfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

from chainvigil.problems import InputProblem
from chainvigil.rules import RUN_INFO_FILE as RUN_INFO_NAME, SIGNAL_FILE as STOP_SIGNAL_NAME

__all__ = [
    "Batch",
    "Header",
    "CsvChainReader",
    "RunFolder",
    "RootScan",
    "parse_header",
    "load_npz_chunk",
    "pending_chunks",
    "read_run_info",
    "validate_run_info",
    "scan_root",
    "RUN_INFO_NAME",
    "STOP_SIGNAL_NAME",
    "DEFAULT_MAX_BYTES",
]

DEFAULT_MAX_BYTES = 32 * 1024 * 1024
"""Largest piece of a CSV file read by one :meth:`CsvChainReader.read_new` call."""

HEADER_MAX_BYTES = 16 * 1024 * 1024
"""A header line longer than this is refused (a file without newlines is not a CSV chain)."""

MAX_ROW_PROBLEMS = 20
"""Rows skipped in one batch that are reported one by one; the rest are summed up in one problem."""

_LOGLIK_RE = re.compile(r"loglik\[(\d+)\]")
_NL, _COMMA, _HASH = 10, 44, 35


# --------------------------------------------------------------------------------------------------
# batches


@dataclass
class Batch:
    """Whole draws read from one file.

    Attributes
    ----------
    loglik : ndarray, shape (draws, n), float64
        Pointwise log-likelihood; column ``i`` is observation ``i + 1``. NaN and ±inf are kept (and
        reported in ``problems`` with kind ``'bad_values'``).
    params : ndarray, shape (draws, p), float64
        Parameter values, columns in the order of ``param_names``.
    draw_ids : ndarray, shape (draws,), int64, or None
        Draw numbers when the file carries them.
    param_names : tuple of str
    start_offset, end_offset : int
        For a CSV file, the byte range consumed (resume from ``end_offset``); for an NPZ chunk, 0 and the
        chunk's size in bytes.
    problems : list of InputProblem
        Rows skipped and values flagged; the draws above are everything that was good.
    path : str
        The file read.
    more : bool
        True when the reader stopped at its piece size with more complete lines possibly waiting: call
        again at once.
    """

    loglik: np.ndarray
    params: np.ndarray
    draw_ids: np.ndarray | None
    param_names: tuple[str, ...]
    start_offset: int
    end_offset: int
    problems: list[InputProblem] = field(default_factory=list)
    path: str = ""
    more: bool = False

    @property
    def draws(self) -> int:
        return int(self.loglik.shape[0])

    @property
    def n(self) -> int:
        return int(self.loglik.shape[1])


def _nonfinite_problems(path: str, values: np.ndarray, label, what: str,
                        column_names: Sequence[str]) -> list[InputProblem]:
    """One ``'bad_values'`` problem listing the draws and columns holding NaN or ±inf."""
    bad = ~np.isfinite(values)
    if not bad.any():
        return []
    rows = np.flatnonzero(bad.any(axis=1))
    parts = []
    for r in rows[:5]:
        cols = np.flatnonzero(bad[r])
        names = ", ".join(column_names[c] for c in cols[:8])
        if cols.size > 8:
            names += f" and {cols.size - 8} more"
        parts.append(f"{label(int(r))} ({names})")
    text = "; ".join(parts)
    if rows.size > 5:
        text += f"; and {rows.size - 5} more draws"
    return [InputProblem(path, f"{what} is NaN or infinite at {text}", "bad_values")]


def _empty_batch(path: str, offset: int, n: int = 0, names: tuple[str, ...] = (),
                 problems: list[InputProblem] | None = None, more: bool = False) -> Batch:
    return Batch(np.empty((0, n)), np.empty((0, len(names))), None, names, offset, offset,
                 problems or [], path, more)


# --------------------------------------------------------------------------------------------------
# CSV


@dataclass(frozen=True)
class Header:
    """The columns of a CSV chain file.

    ``loglik_cols[i]`` is the field index of ``loglik[i+1]``; ``param_cols[j]`` the field index of
    ``param_names[j]``; ``draw_col`` the field index of ``draw`` or None.
    """

    names: tuple[str, ...]
    draw_col: int | None
    param_cols: tuple[int, ...]
    param_names: tuple[str, ...]
    loglik_cols: tuple[int, ...]

    @property
    def n(self) -> int:
        """Number of observations (log-likelihood columns)."""
        return len(self.loglik_cols)

    @property
    def n_fields(self) -> int:
        return len(self.names)

    @property
    def line(self) -> str:
        """The header as one line (without the newline), e.g. to record it."""
        return ",".join(self.names)


def parse_header(line: str | bytes, path: str | os.PathLike = "<header>") -> Header:
    """Parse a CSV header line into a :class:`Header`.

    Columns: an optional ``draw`` (integer draw number), ``loglik[1]`` … ``loglik[n]`` (1-based, every
    index present exactly once, in any order), and parameter columns (any other name). Names may be
    surrounded by spaces or double quotes.

    Raises InputProblem: ``'not_ours'`` when there is no ``loglik[i]`` column, ``'bad_header'`` for
    empty or duplicate names, indices missing or repeated, or a ``loglik[...]`` name without an index.
    """
    path = os.fspath(path)
    if isinstance(line, bytes):
        try:
            line = line.decode("utf-8")
        except UnicodeDecodeError:
            raise InputProblem(path, "the header line is not UTF-8 text", "bad_header") from None
    line = line.lstrip("\ufeff").rstrip("\r\n")
    names = tuple(part.strip().strip('"').strip() for part in line.split(","))
    if not any(nm.startswith("loglik[") for nm in names):
        raise InputProblem(path, "the header has no loglik[i] columns, so this is not a chain file "
                                 f"(header starts {line[:60]!r})", "not_ours")
    empty = [i + 1 for i, nm in enumerate(names) if not nm]
    if empty:
        raise InputProblem(path, f"the header has empty column names (columns {_ints(empty)})",
                           "bad_header")
    seen: dict[str, int] = {}
    dups = []
    for nm in names:
        seen[nm] = seen.get(nm, 0) + 1
        if seen[nm] == 2:
            dups.append(nm)
    if dups:
        raise InputProblem(path, f"the header repeats column names: {', '.join(dups[:10])}", "bad_header")
    by_index: dict[int, list[int]] = {}
    draw_col = None
    param_cols, param_names = [], []
    for col, nm in enumerate(names):
        m = _LOGLIK_RE.fullmatch(nm)
        if m:
            by_index.setdefault(int(m.group(1)), []).append(col)
        elif nm.startswith("loglik["):
            raise InputProblem(path, f"column {nm!r} looks like a log-likelihood column but is not "
                                     "named loglik[i] with a whole number i", "bad_header")
        elif nm == "draw":
            draw_col = col
        else:
            param_cols.append(col)
            param_names.append(nm)
    n = max(by_index)
    repeated = sorted(i for i, cols in by_index.items() if len(cols) > 1)
    if repeated:
        raise InputProblem(path, f"the header names loglik[{repeated[0]}] more than once "
                                 "(as differently written numbers)", "bad_header")
    missing = sorted(set(range(1, n + 1)) - set(by_index))
    if 0 in by_index:
        raise InputProblem(path, "the header has loglik[0]; observations are numbered from 1", "bad_header")
    if missing:
        raise InputProblem(path, f"the header has loglik[1]..loglik[{n}] with gaps: missing "
                                 f"{_ints(missing)}", "bad_header")
    return Header(names, draw_col, tuple(param_cols), tuple(param_names),
                  tuple(by_index[i][0] for i in range(1, n + 1)))


def _ints(values: Sequence[int], limit: int = 10) -> str:
    text = ", ".join(str(v) for v in values[:limit])
    return text + (f" and {len(values) - limit} more" if len(values) > limit else "")


class CsvChainReader:
    """Incremental reader of one append-only CSV chain file.

    Parameters
    ----------
    path : path-like
    offset : int
        Byte offset already consumed (0 for a new chain; a committed offset when resuming).
    header : Header, str or None
        The header recorded when the chain was first read (as :class:`Header` or its ``line``). When the
        file's header differs, :meth:`read_new` raises ``'header_changed'``.
    max_bytes : int
        Largest piece read per call; :attr:`Batch.more` says when to call again.

    Attributes ``offset`` (next byte to read) and ``header`` (None until the header line is complete)
    are updated by each call.
    """

    def __init__(self, path: str | os.PathLike, offset: int = 0, header: Header | str | None = None,
                 *, max_bytes: int = DEFAULT_MAX_BYTES):
        self.path = os.fspath(path)
        if offset < 0:
            raise ValueError(f"offset must be >= 0, got {offset}")
        if max_bytes < 1:
            raise ValueError(f"max_bytes must be >= 1, got {max_bytes}")
        self._offset = int(offset)
        if isinstance(header, str):
            header = parse_header(header, self.path)
        self.header: Header | None = header
        self.max_bytes = int(max_bytes)
        self._header_raw: bytes | None = None
        self._lines_before: int | None = 0 if offset == 0 else None  # newlines before self.offset

    @property
    def offset(self) -> int:
        """The next byte to read. Setting it (e.g. to rewind to a batch's start) is allowed."""
        return self._offset

    @offset.setter
    def offset(self, value: int) -> None:
        value = int(value)
        if value != self._offset:
            self._offset = value
            self._lines_before = None          # recounted from the file when a problem needs it

    # ---------------------------------------------------------------------------------------------

    def read_new(self, max_bytes: int | None = None) -> Batch:
        """Read the complete lines appended since :attr:`offset` (at most ``max_bytes`` bytes).

        Returns a Batch of the good rows; rows with the wrong number of fields or a non-numeric field
        are skipped with a problem naming the line and byte offset. Raises InputProblem for the whole
        file: ``'header_changed'``, ``'rewritten'`` (shorter than the offset, or no longer ending a line
        there), ``'bad_header'``/``'not_ours'`` (header unusable), ``'unreadable'``.
        """
        limit = self.max_bytes if max_bytes is None else int(max_bytes)
        try:
            f = open(self.path, "rb")
        except OSError as exc:
            raise InputProblem(self.path, f"cannot open the file ({exc.strerror or exc})", "unreadable") from None
        with f:
            size = os.fstat(f.fileno()).st_size
            if size < self.offset:
                raise InputProblem(self.path, f"the file is now {size} bytes, shorter than the "
                                              f"{self.offset} bytes already read (was it rewritten?)", "rewritten")
            found = self._read_header(f)
            if found is None:
                if self.header is not None and self.offset > 0:
                    raise InputProblem(self.path, "the header line is gone or incomplete "
                                                  "(was the file rewritten?)", "header_changed")
                return _empty_batch(self.path, self.offset)
            header, data_start, header_lines = found
            if self._offset < data_start:
                self._offset = data_start
                self._lines_before = header_lines
            elif self.offset > data_start:
                f.seek(self.offset - 1)
                if f.read(1) != b"\n":
                    raise InputProblem(self.path, f"byte {self.offset - 1} is no longer the end of a "
                                                  "line (was the file rewritten?)", "rewritten")
            start = self.offset
            f.seek(start)
            piece = f.read(limit)
            last_nl = piece.rfind(b"\n")
            if last_nl < 0:
                if len(piece) == limit and start + limit < size:
                    return self._skip_long_line(f, start, header)
                return _empty_batch(self.path, start, header.n, header.param_names)
            data = piece[: last_nl + 1]
            batch = self._parse(data, start, header)
            self._offset = start + len(data)
            if self._lines_before is not None:
                self._lines_before += data.count(b"\n")
            batch.more = len(piece) == limit and self.offset < size
            return batch

    # ---------------------------------------------------------------------------------------------

    def _read_header(self, f) -> tuple[Header, int, int] | None:
        """Find the header (first line that is neither blank nor a comment) → (header, end, lines)."""
        f.seek(0)
        lines = 0
        while True:
            line = f.readline(HEADER_MAX_BYTES)
            if not line.endswith(b"\n"):
                if len(line) >= HEADER_MAX_BYTES:
                    raise InputProblem(self.path, f"no line end in the first {HEADER_MAX_BYTES} bytes; "
                                                  "not a chain file", "not_ours")
                return None
            lines += 1
            stripped = line.strip()
            if not stripped or stripped.startswith(b"#"):
                continue
            break
        end = f.tell()
        if line != self._header_raw:
            header = parse_header(line, self.path)
            if self.header is not None and header.names != self.header.names:
                raise InputProblem(self.path, "the header is not the one recorded when reading started "
                                              f"(now {header.n} observations, parameters "
                                              f"{list(header.param_names)[:5]}; was {self.header.n} and "
                                              f"{list(self.header.param_names)[:5]})", "header_changed")
            self.header = header
            self._header_raw = line
        return self.header, end, lines

    def _line_number(self, lines_in_piece: int) -> int:
        """1-based line number of a line, given the newlines before it inside the current piece."""
        if self._lines_before is None:
            count = 0
            with open(self.path, "rb") as g:
                remaining = self.offset
                while remaining > 0:
                    chunk = g.read(min(remaining, 1 << 20))
                    if not chunk:
                        break
                    count += chunk.count(b"\n")
                    remaining -= len(chunk)
            self._lines_before = count
        return self._lines_before + lines_in_piece + 1

    def _skip_long_line(self, f, start: int, header: Header) -> Batch:
        """A line longer than the piece size: find its end without holding it, skip it, report it."""
        pos = start
        f.seek(start)
        while True:
            chunk = f.read(1 << 20)
            if not chunk:
                return _empty_batch(self.path, start, header.n, header.param_names)  # no end yet
            i = chunk.find(b"\n")
            if i >= 0:
                end = pos + i + 1
                break
            pos += len(chunk)
        line_no = self._line_number(0)
        problem = InputProblem(self.path, f"line {line_no} (byte {start}) is {end - start} bytes long, "
                                          "more than one read may hold; skipped", "long_row")
        self._offset = end
        self._lines_before = line_no
        return Batch(np.empty((0, header.n)), np.empty((0, len(header.param_names))), None,
                     header.param_names, start, end, [problem], self.path, True)

    def _parse(self, data: bytes, start: int, header: Header) -> Batch:
        """Parse complete lines (``data`` ends with a newline) with numpy, keeping every good row."""
        arr = np.frombuffer(data, dtype=np.uint8)
        ends = np.flatnonzero(arr == _NL)                    # index of each line's newline
        starts = np.empty_like(ends)
        starts[0] = 0
        starts[1:] = ends[:-1] + 1
        commas = np.diff(np.cumsum(arr == _COMMA)[ends], prepend=0)
        visible = np.diff(np.cumsum(arr > 32)[ends], prepend=0)
        comment = arr[starts] == _HASH
        data_line = (visible > 0) & ~comment
        wrong = data_line & (commas != header.n_fields - 1)
        good = data_line & ~wrong
        problems: list[InputProblem] = []
        row_problems: list[tuple[int, str, str]] = []       # (line index, text, kind)
        for i in np.flatnonzero(wrong)[: MAX_ROW_PROBLEMS + 1]:
            row_problems.append((int(i), f"has {commas[i] + 1} fields, the header has "
                                         f"{header.n_fields}", "bad_row"))
        good_idx = np.flatnonzero(good)
        if good_idx.size == 0:
            values = np.empty((0, header.n_fields))
            ok = np.zeros(0, dtype=bool)
        else:
            if good_idx.size == ends.size:
                buf = data
                bstarts, bends = starts, ends + 1
            else:
                lengths = ends + 1 - starts
                buf = arr[np.repeat(good, lengths)].tobytes()
                glen = lengths[good_idx]
                bends = np.cumsum(glen)
                bstarts = bends - glen
            values = np.empty((good_idx.size, header.n_fields))
            ok = np.ones(good_idx.size, dtype=bool)
            self._parse_rows(buf, bstarts, bends, 0, good_idx.size, values, ok, header.n_fields)
            for r in np.flatnonzero(~ok)[: MAX_ROW_PROBLEMS + 1]:
                line = buf[bstarts[r]: bends[r]]
                row_problems.append((int(good_idx[r]), self._describe_non_numeric(line, header),
                                     "non_numeric"))
            if header.draw_col is not None:
                d = values[:, header.draw_col]
                bad_draw = ok & ~((d == np.floor(d)) & np.isfinite(d) & (np.abs(d) < 2.0**62))
                for r in np.flatnonzero(bad_draw)[: MAX_ROW_PROBLEMS + 1]:
                    row_problems.append((int(good_idx[r]), f"has draw number {d[r]!r}, not a whole "
                                                           "number", "bad_row"))
                ok &= ~bad_draw
        n_skipped = int(wrong.sum() + (~ok).sum())
        row_problems.sort()
        for i, text, kind in row_problems[:MAX_ROW_PROBLEMS]:
            line_no = self._line_number(int(i))
            problems.append(InputProblem(self.path, f"line {line_no} (byte {start + int(starts[i])}) "
                                                    f"{text}; row skipped", kind))
        if n_skipped > MAX_ROW_PROBLEMS:
            problems.append(InputProblem(self.path, f"{n_skipped - MAX_ROW_PROBLEMS} more rows skipped "
                                                    f"between bytes {start} and {start + len(data)}",
                                         "bad_row"))
        values = values[ok]
        loglik = np.ascontiguousarray(values[:, list(header.loglik_cols)])
        params = np.ascontiguousarray(values[:, list(header.param_cols)])
        draw_ids = None
        if header.draw_col is not None:
            draw_ids = values[:, header.draw_col].astype(np.int64)
        if values.shape[0]:
            kept_lines = good_idx[ok]
            if draw_ids is not None:
                def labels(r: int) -> str:
                    return f"draw {draw_ids[r]}"
            else:
                def labels(r: int) -> str:
                    return f"line {self._line_number(int(kept_lines[r]))}"
            obs_names = [f"observation {i}" for i in range(1, header.n + 1)]
            problems += _nonfinite_problems(self.path, loglik, labels, "the log-likelihood", obs_names)
            problems += _nonfinite_problems(self.path, params, labels, "a parameter value",
                                            list(header.param_names))
        return Batch(loglik, params, draw_ids, header.param_names, start, start + len(data),
                     problems, self.path)

    @staticmethod
    def _parse_rows(buf: bytes, bstarts, bends, lo: int, hi: int, out: np.ndarray, ok: np.ndarray,
                    n_fields: int) -> None:
        """Parse lines ``lo:hi`` of ``buf`` in one np.loadtxt call; on failure halve to find bad rows."""
        stack = [(lo, hi)]
        while stack:
            a, b = stack.pop()
            chunk = buf[bstarts[a]: bends[b - 1]]
            try:
                vals = np.loadtxt(io.BytesIO(chunk), delimiter=",", comments=None, ndmin=2,
                                  dtype=np.float64, encoding="latin-1")
            except ValueError:
                vals = None
            if vals is not None and vals.shape == (b - a, n_fields):
                out[a:b] = vals
                continue
            if b - a == 1:
                ok[a] = False
                continue
            mid = (a + b) // 2
            stack.append((mid, b))
            stack.append((a, mid))

    @staticmethod
    def _describe_non_numeric(line: bytes, header: Header) -> str:
        fields = line.rstrip(b"\r\n").split(b",")
        for name, raw in zip(header.names, fields):
            try:
                np.loadtxt([raw.decode("latin-1")], delimiter=",", comments=None, dtype=np.float64)
            except ValueError:
                shown = raw.decode("utf-8", "replace").strip()
                return f"has {shown[:40]!r} in column {name!r}, which is not a number"
        return "has a field that is not a number"


# --------------------------------------------------------------------------------------------------
# NPZ


def _npz_member_dtypes(path: str, zf: zipfile.ZipFile) -> dict[str, tuple[tuple[int, ...], np.dtype]]:
    """Read each member's .npy header (shape, dtype) without reading its data."""
    out = {}
    for info in zf.infolist():
        name = info.filename
        if not name.endswith(".npy"):
            continue
        with zf.open(info) as fp:
            version = np.lib.format.read_magic(fp)
            if version == (1, 0):
                shape, _fortran, dtype = np.lib.format.read_array_header_1_0(fp)
            else:
                shape, _fortran, dtype = np.lib.format.read_array_header_2_0(fp)
        out[name[:-4]] = (tuple(shape), dtype)
    return out


def load_npz_chunk(path: str | os.PathLike, n_expected: int | None = None,
                   param_names_expected: Sequence[str] | None = None) -> Batch:
    """Load one NPZ chunk of draws.

    Arrays: ``loglik`` (draws × n, floating point; required), ``params`` (draws × p, numeric),
    ``param_names`` (p, fixed-width unicode), ``draw`` (draws, integer). Other arrays are ignored.
    Loaded with ``allow_pickle=False``; member headers are checked first, so an object array is refused
    before anything is read.

    Raises InputProblem with kind ``'not_npz'``, ``'truncated_npz'``, ``'pickled_npz'``, ``'bad_npz'``,
    ``'n_mismatch'`` (``n_expected`` given and different), ``'header_changed'`` (parameter names
    different from ``param_names_expected``) or ``'unreadable'``. NaN/±inf values are kept and reported as
    ``'bad_values'`` in ``Batch.problems``.
    """
    path = os.fspath(path)
    try:
        size = os.stat(path).st_size
        with open(path, "rb") as f:
            magic = f.read(4)
    except OSError as exc:
        raise InputProblem(path, f"cannot open the file ({exc.strerror or exc})", "unreadable") from None
    if size == 0:
        raise InputProblem(path, "the chunk file is empty", "truncated_npz")
    if magic[:2] != b"PK":
        what = "a single .npy array" if magic.startswith(b"\x93NUM") else "not a zip archive"
        raise InputProblem(path, f"not an NPZ archive ({what})", "not_npz")
    try:
        with zipfile.ZipFile(path) as zf:
            members = _npz_member_dtypes(path, zf)
    except (zipfile.BadZipFile, EOFError, OSError) as exc:
        raise InputProblem(path, f"the NPZ archive is incomplete or damaged ({exc})", "truncated_npz") from None
    except ValueError as exc:
        raise InputProblem(path, f"an array header in the NPZ archive is malformed ({exc})", "bad_npz") from None
    pickled = sorted(name for name, (_s, dt) in members.items() if dt.hasobject)
    if pickled:
        raise InputProblem(path, f"array {pickled[0]!r} holds Python objects (pickled data); "
                                 "such chunks are never loaded", "pickled_npz")
    if "loglik" not in members:
        raise InputProblem(path, "the chunk has no array named 'loglik' "
                                 f"(found {sorted(members) or 'none'})", "bad_npz")
    wanted = [k for k in ("loglik", "params", "param_names", "draw") if k in members]
    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {k: z[k] for k in wanted}
    except (zipfile.BadZipFile, EOFError, OSError) as exc:
        raise InputProblem(path, f"the NPZ archive is incomplete or damaged ({exc})", "truncated_npz") from None
    except ValueError as exc:
        raise InputProblem(path, f"an array in the NPZ archive cannot be read ({exc})", "truncated_npz") from None

    loglik = arrays["loglik"]
    if loglik.ndim != 2:
        raise InputProblem(path, f"'loglik' has shape {loglik.shape}; expected (draws, n)", "bad_npz")
    if loglik.dtype.kind != "f":
        raise InputProblem(path, f"'loglik' has dtype {loglik.dtype}; expected floating point", "bad_npz")
    draws, n = loglik.shape
    if n == 0:
        raise InputProblem(path, "'loglik' has no observations (shape (draws, 0))", "bad_npz")
    if n_expected is not None and n != n_expected:
        raise InputProblem(path, f"'loglik' has {n} observations; this chain has {n_expected}", "n_mismatch")
    loglik = np.ascontiguousarray(loglik, dtype=np.float64)

    params = arrays.get("params")
    names_arr = arrays.get("param_names")
    if params is None:
        if names_arr is not None and names_arr.size:
            raise InputProblem(path, "'param_names' is given but there is no 'params' array", "bad_npz")
        params = np.empty((draws, 0))
    else:
        if params.ndim != 2 or params.shape[0] != draws:
            raise InputProblem(path, f"'params' has shape {params.shape}; expected ({draws}, p)", "bad_npz")
        if params.dtype.kind not in "fiub":
            raise InputProblem(path, f"'params' has dtype {params.dtype}; expected numbers", "bad_npz")
        params = np.ascontiguousarray(params, dtype=np.float64)
    p = params.shape[1]
    if names_arr is not None:
        if names_arr.dtype.kind != "U" or names_arr.ndim != 1:
            raise InputProblem(path, f"'param_names' has dtype {names_arr.dtype} and shape "
                                     f"{names_arr.shape}; expected a 1-D fixed-width unicode array", "bad_npz")
        names = tuple(str(s) for s in names_arr)
        if len(names) != p:
            raise InputProblem(path, f"'param_names' has {len(names)} names for {p} parameter columns", "bad_npz")
        if len(set(names)) != len(names) or not all(names):
            raise InputProblem(path, "'param_names' has empty or repeated names", "bad_npz")
    elif param_names_expected is not None and len(param_names_expected) == p:
        names = tuple(param_names_expected)
    else:
        names = tuple(f"param[{j}]" for j in range(1, p + 1))
    if param_names_expected is not None and tuple(param_names_expected) != names:
        raise InputProblem(path, f"parameter names {list(names)[:5]} differ from this chain's "
                                 f"{list(param_names_expected)[:5]}", "header_changed")

    draw_ids = arrays.get("draw")
    if draw_ids is not None:
        if draw_ids.ndim != 1 or draw_ids.shape[0] != draws or draw_ids.dtype.kind not in "iu":
            raise InputProblem(path, f"'draw' has shape {draw_ids.shape} and dtype {draw_ids.dtype}; "
                                     f"expected ({draws},) integers", "bad_npz")
        draw_ids = draw_ids.astype(np.int64)

    def labels(r: int) -> str:
        return f"draw {draw_ids[r]}" if draw_ids is not None else f"row {r + 1} of the chunk"

    problems = _nonfinite_problems(path, loglik, labels, "the log-likelihood",
                                   [f"observation {i}" for i in range(1, n + 1)])
    problems += _nonfinite_problems(path, params, labels, "a parameter value", list(names))
    return Batch(loglik, params, draw_ids, names, 0, size, problems, path)


def pending_chunks(chunk_dir: str | os.PathLike, taken: Iterable[str]) -> list[str]:
    """Names of the ``*.npz`` chunks in ``chunk_dir`` not in ``taken``, in name order.

    Hidden files (temporary names such as ``.00000003.npz.tmp``) and anything that is not a regular
    file (including symbolic links) are left out. A missing folder has no chunks.
    """
    taken = set(taken)
    try:
        entries = list(os.scandir(chunk_dir))
    except (FileNotFoundError, NotADirectoryError):
        return []
    names = [e.name for e in entries
             if e.name.endswith(".npz") and not e.name.startswith(".") and e.name not in taken
             and e.is_file(follow_symlinks=False)]
    return sorted(names)


# --------------------------------------------------------------------------------------------------
# run.json

_RUN_INFO_TYPES = {
    "title": "a string",
    "dataset": "a string",
    "observation_labels": "a list of strings",
    "n_params": "a whole number >= 0",
    "point_loglik": "a finite number",
    "targets": "an object of names to numbers, strings, true/false or null",
}


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def validate_run_info(info) -> dict:
    """Check the fields of a run description (docs/input-format.md) and return the known ones.

    ``{"title": str, "dataset": str, "observation_labels": [str], "n_params": int, "point_loglik":
    float, "targets": {name: number|str|bool|null}}``; every field optional, unknown keys dropped.
    Raises ValueError naming the field and what is wrong.
    """
    if not isinstance(info, dict):
        raise ValueError(f"the run description must be a JSON object, not {type(info).__name__}")
    out = {}
    for key, want in _RUN_INFO_TYPES.items():
        if key not in info:
            continue
        v = info[key]
        if key in ("title", "dataset"):
            ok = isinstance(v, str)
        elif key == "observation_labels":
            ok = isinstance(v, list) and all(isinstance(s, str) for s in v)
            if ok:
                v = list(v)
        elif key == "n_params":
            ok = isinstance(v, int) and not isinstance(v, bool) and v >= 0
        elif key == "point_loglik":
            ok = _is_number(v) and math.isfinite(v)
            if ok:
                v = float(v)
        else:
            ok = isinstance(v, dict) and all(
                isinstance(k, str) and (v2 is None or isinstance(v2, (str, bool))
                                        or (_is_number(v2) and math.isfinite(v2)))
                for k, v2 in v.items())
            if ok:
                v = dict(v)
        if not ok:
            raise ValueError(f"{key!r} must be {want}, got {json.dumps(v, default=repr)[:60]}")
        out[key] = v
    return out


def read_run_info(path: str | os.PathLike) -> dict:
    """Read and check ``run.json``; see :func:`validate_run_info` for the fields.

    Raises InputProblem ``'bad_run_info'`` for text that is not JSON (perhaps still being written: try
    again later) or fields of the wrong type, ``'unreadable'`` when the file cannot be read.
    """
    path = os.fspath(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise InputProblem(path, f"cannot read the file ({exc.strerror or exc})", "unreadable") from None
    try:
        info = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise InputProblem(path, f"not valid JSON, perhaps still being written ({exc})", "bad_run_info") from None
    try:
        return validate_run_info(info)
    except ValueError as exc:
        raise InputProblem(path, str(exc), "bad_run_info") from None


# --------------------------------------------------------------------------------------------------
# scanning the root


@dataclass
class RunFolder:
    """What one run folder holds: CSV chains, NPZ chain folders and the optional run.json."""

    path: str
    csv_chains: dict[str, str] = field(default_factory=dict)
    npz_chains: dict[str, str] = field(default_factory=dict)
    run_info: str | None = None
    problems: list[InputProblem] = field(default_factory=list)

    @property
    def name(self) -> str:
        return os.path.basename(self.path)

    @property
    def chains(self) -> list[str]:
        return sorted(set(self.csv_chains) | set(self.npz_chains))


class RootScan(dict):
    """``{run_name: RunFolder}`` with ``problems``: every problem found in the scan, each once."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.problems: list[InputProblem] = []


def _inside(path: str, root: str) -> bool:
    return path == root or path.startswith(root.rstrip(os.sep) + os.sep)


def scan_root(root: str | os.PathLike, ignore: Iterable[str | os.PathLike] = (),
              seen: set | None = None, only: Iterable[str] | None = None) -> RootScan:
    """List the runs under ``root`` and what each holds.

    A run is a folder directly under the root; a chain is a ``<chain>.csv`` file or a ``<chain>/``
    folder of NPZ chunks inside it. Hidden entries, the paths in ``ignore`` (the state folder) and the
    stop signal file are skipped. Symbolic links are followed only when they resolve inside the root;
    the others become ``'outside_root'`` problems. Files the monitor does not understand become
    ``'not_ours'`` problems (a CSV's header is checked by the reader, not here).

    ``seen``: a set of problem keys; problems whose key is in it are left out and new keys are added,
    so repeated scans report each problem once. ``only``: scan just these run names.
    """
    root = os.fspath(root)
    root_real = os.path.realpath(root)
    ignored = {os.path.realpath(p) for p in ignore}
    scan = RootScan()

    def report(folder: RunFolder | None, problem: InputProblem) -> None:
        if seen is not None:
            if problem.key in seen:
                return
            seen.add(problem.key)
        scan.problems.append(problem)
        if folder is not None:
            folder.problems.append(problem)

    def entries(folder: str) -> list[os.DirEntry]:
        try:
            return sorted(os.scandir(folder), key=lambda e: e.name)
        except OSError:
            return []

    def resolve(entry: os.DirEntry, folder: RunFolder | None) -> str | None:
        """Real path of an entry, or None when it must not be followed."""
        real = os.path.realpath(entry.path)
        if real in ignored:
            return None
        if entry.is_symlink() and not _inside(real, root_real):
            report(folder, InputProblem(entry.path, f"symbolic link to {real}, outside the watched "
                                                    "root; not followed", "outside_root"))
            return None
        return real

    wanted = None if only is None else set(only)
    for run_entry in entries(root):
        name = run_entry.name
        if name.startswith(".") or (wanted is not None and name not in wanted):
            continue
        real = resolve(run_entry, None)
        if real is None:
            continue
        if not os.path.isdir(real):
            report(None, InputProblem(run_entry.path, "a file directly in the watched root; runs are "
                                                      "folders, so it is ignored", "not_ours"))
            continue
        folder = RunFolder(run_entry.path)
        scan[name] = folder
        dirs: dict[str, os.DirEntry] = {}
        for entry in entries(run_entry.path):
            ename = entry.name
            if ename.startswith(".") or ename == STOP_SIGNAL_NAME:
                continue
            ereal = resolve(entry, folder)
            if ereal is None:
                continue
            if os.path.isdir(ereal):
                dirs[ename] = entry
            elif ename == RUN_INFO_NAME:
                folder.run_info = entry.path
            elif ename.endswith(".csv") and len(ename) > 4:
                folder.csv_chains[ename[:-4]] = entry.path
            else:
                report(folder, InputProblem(entry.path, "not a chain file (expected <chain>.csv, a "
                                                        "<chain>/ folder of .npz chunks, or run.json); "
                                                        "ignored", "not_ours"))
        for chain, entry in dirs.items():
            if chain in folder.csv_chains:
                report(folder, InputProblem(entry.path, f"chain {chain!r} is both a CSV file and a chunk "
                                                        "folder; the folder is ignored", "not_ours"))
                continue
            folder.npz_chains[chain] = entry.path
            for inner in entries(entry.path):
                if inner.name.startswith("."):
                    continue
                if inner.is_symlink():
                    if resolve(inner, folder) is not None:
                        report(folder, InputProblem(inner.path, "symbolic link in a chunk folder; chunks "
                                                                "must be regular files, ignored", "not_ours"))
                elif not (inner.name.endswith(".npz") and inner.is_file()):
                    report(folder, InputProblem(inner.path, "not an .npz chunk; ignored", "not_ours"))
    return scan
