"""Readers for run folders (the input contract, docs/input-format.md).

A watched root holds one folder per run::

    ROOT/<run>/run.json          optional description of the run (read_run_info)
    ROOT/<run>/<chain>.csv       append-only text, one header line then one line per draw (CsvChainReader)
    ROOT/<run>/<chain>/*.npz     chunk files made visible by atomic rename (load_npz_chunk, pending_chunks)

Every reader hands back a :class:`Batch` of whole draws: ``loglik`` shaped ``(draws, n)``, ``params``
shaped ``(draws, p)``, optional draw numbers, the position of each draw within its chain (warm-up and
thinning, :class:`ReadOptions`) and a list of :class:`~chainvigil.problems.InputProblem` for whatever
was skipped or flagged. A problem that makes the whole file unusable is raised instead.

Hostile input is bounded: only regular files are opened (``O_NONBLOCK`` then an ``fstat`` check, so a
FIFO never blocks), every size the input declares is checked against :class:`ReaderLimits` before
anything is allocated or decompressed, NPZ members are decompressed as a capped stream, and names the
draw store cannot hold are refused by the root scan. Nothing here writes anything; NPZ data is parsed
from the ``.npy`` header and raw bytes (never unpickled).
"""

from __future__ import annotations

import csv
import errno
import fnmatch
import io
import json
import math
import os
import re
import stat
import zipfile
import zlib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np

from chainvigil.problems import InputProblem
from chainvigil.reports import escape_text
from chainvigil.rules import RUN_INFO_FILE as RUN_INFO_NAME, SIGNAL_FILE as STOP_SIGNAL_NAME, STATE_DIR_NAME
from chainvigil.storage.draws import check_name

__all__ = [
    "Batch",
    "Header",
    "CsvChainReader",
    "ReaderLimits",
    "ReadOptions",
    "RunInfo",
    "RunFolder",
    "RootScan",
    "parse_header",
    "load_npz_chunk",
    "pending_chunks",
    "read_options",
    "read_run_info",
    "check_run_info",
    "validate_run_info",
    "name_problem",
    "open_regular",
    "scan_root",
    "RUN_INFO_NAME",
    "STOP_SIGNAL_NAME",
    "STATE_DIR_NAME",
    "DEFAULT_MAX_BYTES",
]

DEFAULT_MAX_BYTES = 32 * 1024 * 1024
"""Largest piece of a CSV file read by one :meth:`CsvChainReader.read_new` call."""

MAX_ROW_PROBLEMS = 20
"""Rows skipped in one batch that are reported one by one; the rest are summed up in one problem."""

_GIB = 1 << 30
_MIB = 1 << 20


# --------------------------------------------------------------------------------------------------
# limits and options


@dataclass(frozen=True)
class ReaderLimits:
    """Bounds on what one input file may make the readers hold or do.

    The defaults are far above what a real run writes; each is there so that a damaged or hostile file
    costs bounded memory and time. Hitting one is reported with kind ``'limit_exceeded'`` naming the
    limit. Every field can be overridden (``ReaderLimits(max_columns=1000)``).

    Attributes
    ----------
    max_member_bytes : int
        Bytes of one NPZ array after decompression (2 GiB).
    max_npz_members : int
        Members of one NPZ archive (1000).
    max_columns : int
        Columns of a CSV header (10 million).
    max_header_bytes : int
        Bytes of a CSV header line (256 MiB).
    max_line_bytes : int
        Bytes of one CSV data line; a longer line is skipped (64 MiB).
    max_run_info_bytes : int
        Bytes of ``run.json`` (4 MiB).
    max_json_depth : int
        Nesting of arrays/objects in ``run.json`` (20).
    max_name_bytes : int
        UTF-8 bytes of a run or chain name (200).
    max_labels : int
        Observation labels in ``run.json`` (10 million).
    max_patterns : int
        Patterns in each of ``params`` / ``ignore`` (1000).
    max_targets : int
        Entries of ``targets`` (200).
    """

    max_member_bytes: int = 2 * _GIB
    max_npz_members: int = 1000
    max_columns: int = 10_000_000
    max_header_bytes: int = 256 * _MIB
    max_line_bytes: int = 64 * _MIB
    max_run_info_bytes: int = 4 * _MIB
    max_json_depth: int = 20
    max_name_bytes: int = 200
    max_labels: int = 10_000_000
    max_patterns: int = 1000
    max_targets: int = 200


DEFAULT_LIMITS = ReaderLimits()


@dataclass(frozen=True)
class ReadOptions:
    """How to read the chains of one run (``run.json`` keys, or defaults for a whole root).

    Attributes
    ----------
    loglik : str
        Name of the pointwise log-likelihood columns (CSV ``NAME[i]``, ``NAME.i``, ``NAME_i`` or with two
        indices ``NAME[i,j]``, ``NAME.i.j``, ``NAME_i_j``; NPZ: the array to read). Default ``'loglik'``.
    warmup : int
        Draws at the start of every chain that are warm-up: read and stored, flagged in
        :attr:`Batch.warmup_rows`, excluded from scores and mixing by the caller. Default 0.
    thin : int
        Keep every ``thin``-th draw after warm-up, counted from the first post-warm-up draw (positions
        ``warmup, warmup + thin, …``). Warm-up draws are all kept. Default 1 (keep all).
    params : tuple of str or None
        fnmatch patterns choosing the parameter columns among the non-log-likelihood columns other
        than ``draw``. None (default): every such column whose name does not end in ``__``
        (bookkeeping columns such as ``lp__`` or ``stepsize__``).
    ignore : tuple of str
        fnmatch patterns of columns that are never parameters (applied after ``params``).
    """

    loglik: str = "loglik"
    warmup: int = 0
    thin: int = 1
    params: tuple[str, ...] | None = None
    ignore: tuple[str, ...] = ()

    def __post_init__(self):
        problem = _option_problem("loglik", self.loglik) or _option_problem("warmup", self.warmup) \
            or _option_problem("thin", self.thin) or _option_problem("ignore", list(self.ignore)) \
            or (None if self.params is None else _option_problem("params", list(self.params)))
        if problem:
            raise ValueError(problem)

    def is_param(self, name: str) -> bool:
        """Whether a (non-log-likelihood, non-``draw``) column is a parameter under these options."""
        if self.params is None:
            chosen = not name.endswith("__")
        else:
            chosen = any(fnmatch.fnmatchcase(name, pat) for pat in self.params)
        return chosen and not any(fnmatch.fnmatchcase(name, pat) for pat in self.ignore)

    def keep(self, positions: np.ndarray) -> np.ndarray:
        """Boolean mask of the draws kept at these 0-based chain positions (warm-up all, then thinned)."""
        positions = np.asarray(positions, dtype=np.int64)
        after = positions - self.warmup
        return (after < 0) | (after % self.thin == 0)


_BAD_NAME_CHARS = re.compile(r"[\x00-\x20\x7f,\"'\[\]]")


def _option_problem(key: str, v) -> str | None:
    """Why a read option's value is unusable, or None. Shared by ReadOptions and run.json checks."""
    if key == "loglik":
        if not isinstance(v, str) or not v or len(v) > 200 or _BAD_NAME_CHARS.search(v):
            return ("'loglik' must be a column name of 1 to 200 characters without spaces, commas, "
                    f"quotes or brackets, got {_shown_value(v)}")
    elif key == "warmup":
        if not _is_int(v) or not 0 <= v < 2**62:
            return f"'warmup' must be a whole number of draws >= 0, got {_shown_value(v)}"
    elif key == "thin":
        if not _is_int(v) or not 1 <= v < 2**31:
            return f"'thin' must be a whole number >= 1, got {_shown_value(v)}"
    elif key in ("params", "ignore"):
        if not isinstance(v, list) or not all(isinstance(s, str) and 0 < len(s) <= 200 for s in v):
            return f"{key!r} must be a list of name patterns (strings of 1 to 200 characters), got {_shown_value(v)}"
    return None


def read_options(info: Mapping | None = None, defaults: ReadOptions | None = None) -> ReadOptions:
    """The read options of a run: ``defaults`` (e.g. the service's or command line's), then the keys
    ``loglik``, ``warmup``, ``thin``, ``params``, ``ignore`` of a checked run description (the dict
    returned by :func:`read_run_info`) where present."""
    base = defaults if defaults is not None else ReadOptions()
    if not info:
        return base
    changes = {}
    for key in ("loglik", "warmup", "thin"):
        if key in info:
            changes[key] = info[key]
    for key in ("params", "ignore"):
        if key in info:
            changes[key] = tuple(info[key])
    return replace(base, **changes) if changes else base


def _is_int(v) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _shown_value(v) -> str:
    try:
        text = json.dumps(v, default=repr)
    except (ValueError, RecursionError):
        text = repr(type(v).__name__)
    return text if len(text) <= 60 else text[:57] + "..."


def _shown_path(path) -> str:
    """A path as printable text: undecodable bytes and control characters escaped."""
    return escape_text(os.fsencode(path).decode("utf-8", "backslashreplace"))


# --------------------------------------------------------------------------------------------------
# opening files


def open_regular(path: str | os.PathLike, what: str = "file"):
    """Open a regular file for binary reading without ever blocking.

    The file is opened with ``O_NONBLOCK`` (a FIFO opens at once instead of waiting for a writer) and
    checked with ``fstat`` after opening (no race with a swap between a check and the open). Raises
    InputProblem ``'not_regular'`` for a FIFO, socket, device or folder, ``'unreadable'`` when the
    system refuses (missing file, permissions, a symbolic link loop).
    """
    shown = _shown_path(path)
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0) | getattr(os, "O_BINARY", 0)
    try:
        fd = os.open(path, flags)
    except OSError as exc:
        raise InputProblem(shown, f"cannot open the {what} ({exc.strerror or exc})", "unreadable") from None
    try:
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            raise InputProblem(shown, f"the {what} is a {_file_type(mode)}, not a regular file; "
                                      "not read", "not_regular")
        if hasattr(os, "set_blocking"):
            os.set_blocking(fd, True)
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


def _file_type(mode: int) -> str:
    for test, name in ((stat.S_ISFIFO, "named pipe (FIFO)"), (stat.S_ISSOCK, "socket"),
                       (stat.S_ISCHR, "character device"), (stat.S_ISBLK, "block device"),
                       (stat.S_ISDIR, "folder")):
        if test(mode):
            return name
    return "special file"


# --------------------------------------------------------------------------------------------------
# batches


@dataclass
class Batch:
    """Whole draws read from one file.

    Attributes
    ----------
    loglik : ndarray, shape (draws, n), float64
        Pointwise log-likelihood; column ``k`` is observation ``k + 1`` (two-index names flattened
        row-major, see ``obs_shape``). NaN and ±inf are kept (and reported with kind ``'bad_values'``).
    params : ndarray, shape (draws, p), float64
        Parameter values, columns in the order of ``param_names``.
    draw_ids : ndarray, shape (draws,), int64, or None
        Draw numbers when the file carries them (strictly increasing within a chain).
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
    positions : ndarray, shape (draws,), int64, or None
        0-based position of each row among all accepted draws of the chain (warm-up included, thinned
        out draws counted). None only for batches built by hand.
    warmup_rows : int
        The first ``warmup_rows`` rows are warm-up draws (store them; leave them out of scores/mixing).
    start_position, end_position : int
        Draws of the chain passed before and after this batch (commit ``end_position`` with
        ``end_offset``/the chunk and pass it back as ``position`` when resuming).
    last_draw : int or None
        The highest draw number accepted so far in the chain (pass back as ``last_draw`` when resuming).
    obs_shape : tuple of int
        ``(n,)``, or ``(I, J)`` for two-index log-likelihood names / 3-D NPZ arrays (``n = I * J``,
        column ``(i - 1) * J + (j - 1)`` holds ``[i, j]``).
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
    positions: np.ndarray | None = None
    warmup_rows: int = 0
    start_position: int = 0
    end_position: int = 0
    last_draw: int | None = None
    obs_shape: tuple[int, ...] = ()

    @property
    def draws(self) -> int:
        return int(self.loglik.shape[0])

    @property
    def n(self) -> int:
        return int(self.loglik.shape[1])

    @property
    def obs_labels(self) -> list[str] | None:
        """``["1,1", "1,2", …]`` for two-index observations (row-major), None for one index."""
        return _pair_labels(self.obs_shape)


def _pair_labels(shape: tuple[int, ...]) -> list[str] | None:
    if len(shape) != 2:
        return None
    rows, cols = shape
    return [f"{i},{j}" for i in range(1, rows + 1) for j in range(1, cols + 1)]


def _nonfinite_problems(path: str, values: np.ndarray, label, what: str,
                        column_name) -> list[InputProblem]:
    """One ``'bad_values'`` problem listing the draws and columns holding NaN or ±inf."""
    bad = ~np.isfinite(values)
    if not bad.any():
        return []
    rows = np.flatnonzero(bad.any(axis=1))
    parts = []
    for r in rows[:5]:
        cols = np.flatnonzero(bad[r])
        names = ", ".join(column_name(int(c)) for c in cols[:8])
        if cols.size > 8:
            names += f" and {cols.size - 8} more"
        parts.append(f"{label(int(r))} ({names})")
    text = "; ".join(parts)
    if rows.size > 5:
        text += f"; and {rows.size - 5} more draws"
    return [InputProblem(path, f"{what} is NaN or infinite at {text}", "bad_values")]


def _observation_namer(shape: tuple[int, ...]):
    if len(shape) == 2:
        cols = shape[1]
        return lambda c: f"observation [{c // cols + 1},{c % cols + 1}]"
    return lambda c: f"observation {c + 1}"


def _select_draws(path: str, loglik: np.ndarray, params: np.ndarray, draw_ids: np.ndarray | None,
                  row_label, options: ReadOptions, position: int, last_draw: int | None):
    """Refuse rows whose draw number does not increase, then place and thin the rest.

    A row whose draw number is not greater than every draw number accepted before it in the chain is
    refused (``'draw_order'``) and does not count as a draw. Returns (loglik, params, draw_ids,
    positions, warmup_rows, end_position, last_draw, problems, rows_kept) where ``rows_kept`` indexes
    the input rows returned.
    """
    problems: list[InputProblem] = []
    rows = loglik.shape[0]
    rows_kept = np.arange(rows)
    if draw_ids is not None and rows:
        before = np.empty(rows, dtype=np.int64)
        before[0] = last_draw if last_draw is not None else np.iinfo(np.int64).min
        if rows > 1:
            np.maximum.accumulate(draw_ids[:-1], out=before[1:])
            np.maximum(before[1:], before[0], out=before[1:])
        ok = draw_ids > before
        if not ok.all():
            bad = np.flatnonzero(~ok)
            shown = ", ".join(f"{row_label(int(r))} has draw {int(draw_ids[r])} after draw {int(before[r])}"
                              for r in bad[:5])
            more = f" and {bad.size - 5} more" if bad.size > 5 else ""
            problems.append(InputProblem(path, f"draw numbers must increase within a chain: {shown}{more}; "
                                               "those rows refused", "draw_order"))
            loglik, params, draw_ids, rows_kept = loglik[ok], params[ok], draw_ids[ok], rows_kept[ok]
        if draw_ids.size:
            last_draw = int(draw_ids[-1])
    accepted = loglik.shape[0]
    positions = np.arange(position, position + accepted, dtype=np.int64)
    if options.warmup or options.thin != 1:
        keep = options.keep(positions)
        if not keep.all():
            loglik, params, positions, rows_kept = loglik[keep], params[keep], positions[keep], rows_kept[keep]
            if draw_ids is not None:
                draw_ids = draw_ids[keep]
    warmup_rows = int(np.count_nonzero(positions < options.warmup))
    return (np.ascontiguousarray(loglik), np.ascontiguousarray(params), draw_ids, positions, warmup_rows,
            position + accepted, last_draw, problems, rows_kept)


# --------------------------------------------------------------------------------------------------
# CSV

_INDEX_FORMS = {
    "[]": re.compile(r"\[\s*(\d+)\s*(?:,\s*(\d+)\s*)?\]"),
    ".": re.compile(r"\.(\d+)(?:\.(\d+))?"),
    "_": re.compile(r"_(\d+)(?:_(\d+))?"),
}
_MAX_INDEX_DIGITS = 18
_NL, _CR, _COMMA, _HASH = 10, 13, 44, 35


@dataclass(frozen=True)
class Header:
    """The columns of a CSV chain file.

    ``loglik_cols[k]`` is the field index of observation ``k + 1`` (``NAME[k+1]``, or for two indices
    the ``k``-th pair in row-major order); ``param_cols[j]`` the field index of ``param_names[j]``;
    ``draw_col`` the field index of ``draw`` or None. ``loglik_name`` and ``style`` (``'[]'``,
    ``'.'`` or ``'_'``) say how the log-likelihood columns are written; ``obs_shape`` is ``(n,)`` or
    ``(I, J)``.
    """

    names: tuple[str, ...]
    draw_col: int | None
    param_cols: tuple[int, ...]
    param_names: tuple[str, ...]
    loglik_cols: tuple[int, ...]
    loglik_name: str = "loglik"
    style: str = "[]"
    obs_shape: tuple[int, ...] = ()

    @property
    def n(self) -> int:
        """Number of observations (log-likelihood columns)."""
        return len(self.loglik_cols)

    @property
    def n_fields(self) -> int:
        return len(self.names)

    @property
    def line(self) -> str:
        """The header as one line (without the newline), e.g. to record it; names holding a comma or a
        double quote are quoted, so :func:`parse_header` gives the same columns back."""
        return ",".join('"' + nm.replace('"', '""') + '"' if ("," in nm or '"' in nm) else nm
                        for nm in self.names)

    @property
    def obs_labels(self) -> list[str] | None:
        """``"i,j"`` labels (row-major) for two-index columns, None for one index."""
        return _pair_labels(self.obs_shape)


def _index_name(name: str, style: str, *idx) -> str:
    if style == "[]":
        return f"{name}[{','.join(map(str, idx))}]"
    return name + "".join(f"{style}{i}" for i in idx)


def parse_header(line: str | bytes, path: str | os.PathLike = "<header>", options: ReadOptions | None = None,
                 limits: ReaderLimits | None = None) -> Header:
    """Parse a CSV header line into a :class:`Header`.

    Columns: an optional ``draw`` (integer draw number), the log-likelihood columns ``NAME[i]``,
    ``NAME.i`` or ``NAME_i`` (``NAME`` is ``options.loglik``, default ``loglik``; 1-based, every index
    1..n present exactly once, in any order; one style per file) or with two indices ``NAME[i,j]``,
    ``NAME.i.j``, ``NAME_i_j`` (every pair of 1..I × 1..J once; flattened row-major, ``i`` slowest), and
    other columns, which are parameters when ``options`` chooses them (by default all but names ending
    in ``__``). Names may be surrounded by spaces or double quotes.

    Raises InputProblem: ``'not_ours'`` when there is no log-likelihood column, ``'bad_header'`` for
    empty or duplicate names, indices missing, repeated, zero, too large or of mixed styles,
    ``'limit_exceeded'`` for more than ``limits.max_columns`` columns.
    """
    path = _shown_path(path)
    options = options if options is not None else ReadOptions()
    limits = limits if limits is not None else DEFAULT_LIMITS
    if isinstance(line, bytes):
        try:
            line = line.decode("utf-8")
        except UnicodeDecodeError:
            raise InputProblem(path, "the header line is not UTF-8 text", "bad_header") from None
    line = line.lstrip("\ufeff").rstrip("\r\n")
    n_cols = line.count(",") + 1
    if n_cols > limits.max_columns:
        raise InputProblem(path, f"the header has {n_cols} columns, more than the limit of "
                                 f"{limits.max_columns} (max_columns)", "limit_exceeded")
    if '"' in line:          # quoted names may hold commas (NAME[i,j]); data lines never do
        try:
            parts = next(csv.reader([line], skipinitialspace=True))
        except csv.Error as exc:
            raise InputProblem(path, f"the header's quoting is malformed ({exc})", "bad_header") from None
    else:
        parts = line.split(",")
    names = tuple(part.strip().strip('"').strip() for part in parts)
    lname = options.loglik
    found: dict[str, list[tuple[int, str, str | None]]] = {}
    draw_col = None
    others: list[int] = []
    for col, nm in enumerate(names):
        if nm.startswith(lname) and len(nm) > len(lname):
            rest = nm[len(lname):]
            style = rest[0] if rest[0] in "._" else ("[]" if rest[0] == "[" else None)
            if style is not None:
                m = _INDEX_FORMS[style].fullmatch(rest)
                if m:
                    found.setdefault(style, []).append((col, m.group(1), m.group(2)))
                    continue
                if style == "[]":
                    raise InputProblem(path, f"column {nm[:80]!r} looks like a log-likelihood column but is "
                                             f"not named {lname}[i] or {lname}[i,j] with whole numbers "
                                             f"(a name with a comma must be in double quotes)", "bad_header")
        if nm == "draw" and draw_col is None:
            draw_col = col
        else:
            others.append(col)
    if not found:
        raise InputProblem(path, f"the header has no {lname}[i] ({lname}.i, {lname}_i) columns, so this is "
                                 f"not a chain file (header starts {line[:60]!r})", "not_ours")
    empty = [i + 1 for i, nm in enumerate(names) if not nm]
    if empty:
        raise InputProblem(path, f"the header has empty column names (columns {_ints(empty)})", "bad_header")
    if len(set(names)) != len(names):
        seen: set[str] = set()
        dups = []
        for nm in names:
            if nm in seen and nm not in dups:
                dups.append(nm)
            seen.add(nm)
        raise InputProblem(path, f"the header repeats column names: {', '.join(d[:80] for d in dups[:10])}",
                           "bad_header")
    if len(found) > 1:
        shown = " and ".join(_index_name(lname, s, 1) for s in sorted(found))
        raise InputProblem(path, f"the header mixes log-likelihood column styles ({shown}); use one",
                           "bad_header")
    (style, entries), = found.items()
    pairs = [e for e in entries if e[2] is not None]
    if pairs and len(pairs) != len(entries):
        raise InputProblem(path, f"the header mixes one-index and two-index {lname} columns", "bad_header")
    for _col, a, b in entries:
        for digits in (a, b):
            if digits is not None and len(digits.lstrip("0")) > _MAX_INDEX_DIGITS:
                raise InputProblem(path, f"the header has a {lname} index with {len(digits)} digits; "
                                         "indices run 1..n", "bad_header")
    count = len(entries)
    cols = np.fromiter((e[0] for e in entries), dtype=np.int64, count=count)
    if not pairs:
        idx = np.fromiter((int(e[1]) for e in entries), dtype=np.int64, count=count)
        order = np.argsort(idx, kind="stable")
        sidx = idx[order]
        if count > 1 and (rep := np.flatnonzero(sidx[1:] == sidx[:-1])).size:
            raise InputProblem(path, f"the header names {_index_name(lname, style, int(sidx[rep[0]]))} more "
                                     "than once (as differently written numbers)", "bad_header")
        if sidx[0] < 1:
            raise InputProblem(path, f"the header has {_index_name(lname, style, 0)}; observations are "
                                     "numbered from 1", "bad_header")
        if sidx[-1] != count:
            present = set(sidx[: count].tolist())
            missing = []
            i = 1
            while len(missing) < 10 and i <= count + 10:     # at most count present: ends quickly
                if i not in present:
                    missing.append(i)
                i += 1
            raise InputProblem(path, f"the header has {count} {lname} columns numbered up to "
                                     f"{_index_name(lname, style, int(sidx[-1]))}; indices must run 1..{count} "
                                     f"without gaps: missing {_ints(missing)}", "bad_header")
        loglik_cols = tuple(cols[order].tolist())
        shape: tuple[int, ...] = (count,)
    else:
        ii = np.fromiter((int(e[1]) for e in entries), dtype=np.int64, count=count)
        jj = np.fromiter((int(e[2]) for e in entries), dtype=np.int64, count=count)
        rows, ncols = int(ii.max()), int(jj.max())
        if ii.min() < 1 or jj.min() < 1:
            raise InputProblem(path, f"the header has a {lname} index 0; observations are numbered from 1",
                               "bad_header")
        if rows * ncols != count:
            raise InputProblem(path, f"the header has {count} two-index {lname} columns but indices up to "
                                     f"[{rows},{ncols}]; every pair 1..{rows} × 1..{ncols} must appear once",
                               "bad_header")
        flat = (ii - 1) * ncols + (jj - 1)
        order = np.argsort(flat, kind="stable")
        if not np.array_equal(flat[order], np.arange(count)):
            raise InputProblem(path, f"the header names some {lname}[i,j] pair more than once (and so misses "
                                     "another)", "bad_header")
        loglik_cols = tuple(cols[order].tolist())
        shape = (rows, ncols)
    param_cols = tuple(c for c in others if options.is_param(names[c]))
    return Header(names, draw_col, param_cols, tuple(names[c] for c in param_cols), loglik_cols,
                  lname, style, shape)


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
        Piece read per call; :attr:`Batch.more` says when to call again. A line longer than the piece is
        still read whole up to ``limits.max_line_bytes``.
    options : ReadOptions
        Log-likelihood name, warm-up, thinning, parameter choice.
    limits : ReaderLimits
    position : int
        Draws of the chain already passed (a committed :attr:`Batch.end_position` when resuming).
    last_draw : int or None
        Highest draw number already accepted (a committed :attr:`Batch.last_draw` when resuming).

    Line ends may be ``\\n``, ``\\r\\n`` or a lone ``\\r`` (decided by the first line end in the file).
    Blank lines and lines whose first visible character is ``#`` are skipped. Attributes ``offset``,
    ``position``, ``last_draw`` and ``header`` are updated by each call; setting ``offset`` back to the
    ``start_offset`` of the batch just read also restores ``position`` and ``last_draw``.
    """

    def __init__(self, path: str | os.PathLike, offset: int = 0, header: Header | str | None = None,
                 *, max_bytes: int = DEFAULT_MAX_BYTES, options: ReadOptions | None = None,
                 limits: ReaderLimits | None = None, position: int = 0, last_draw: int | None = None):
        self.path = os.fspath(path)
        self.shown = _shown_path(self.path)
        if offset < 0:
            raise ValueError(f"offset must be >= 0, got {offset}")
        if max_bytes < 1:
            raise ValueError(f"max_bytes must be >= 1, got {max_bytes}")
        if position < 0:
            raise ValueError(f"position must be >= 0, got {position}")
        self.options = options if options is not None else ReadOptions()
        self.limits = limits if limits is not None else DEFAULT_LIMITS
        self._offset = int(offset)
        self._header_problem: InputProblem | None = None
        if isinstance(header, str):
            try:
                header = parse_header(header, self.path, self.options, self.limits)
            except InputProblem as problem:      # raised by read_new, so building a reader never fails
                self._header_problem = InputProblem(
                    self.shown, f"the recorded header cannot be used with these read options "
                                f"({problem.problem})", "header_changed")
                header = None
        self.header: Header | None = header
        self.max_bytes = int(max_bytes)
        self.position = int(position)
        self.last_draw = last_draw
        self._header_raw: bytes | None = None
        self._header_lines = 0
        self._eol: int | None = None
        self._lines_before: int | None = 0 if offset == 0 else None  # line ends before self.offset
        self._batch_start: tuple[int, int, int | None] | None = None  # (offset, position, last_draw)

    @property
    def offset(self) -> int:
        """The next byte to read. Setting it (e.g. to rewind to a batch's start) is allowed."""
        return self._offset

    @offset.setter
    def offset(self, value: int) -> None:
        value = int(value)
        if value != self._offset:
            if self._batch_start is not None and self._batch_start[0] == value:
                _o, self.position, self.last_draw = self._batch_start
            self._offset = value
            self._lines_before = None          # recounted from the file when a problem needs it

    # ---------------------------------------------------------------------------------------------

    def read_new(self, max_bytes: int | None = None) -> Batch:
        """Read the complete lines appended since :attr:`offset` (at most ``max_bytes`` bytes).

        Returns a Batch of the good rows; rows with the wrong number of fields, a non-numeric field or a
        draw number not above the last one are skipped with a problem naming the line. Raises
        InputProblem for the whole file: ``'header_changed'``, ``'rewritten'`` (shorter than the offset,
        or no longer ending a line there), ``'bad_header'``/``'not_ours'`` (header unusable),
        ``'not_regular'``, ``'unreadable'``, ``'limit_exceeded'`` (header too long or too wide).
        """
        limit = self.max_bytes if max_bytes is None else int(max_bytes)
        if self._header_problem is not None:
            raise self._header_problem
        f = open_regular(self.path, "CSV chain file")
        with f:
            size = os.fstat(f.fileno()).st_size
            if size < self.offset:
                raise InputProblem(self.shown, f"the file is now {size} bytes, shorter than the "
                                               f"{self.offset} bytes already read (was it rewritten?)", "rewritten")
            found = self._read_header(f, size)
            if found is None:
                if self.header is not None and self.offset > 0:
                    raise InputProblem(self.shown, "the header line is gone or incomplete "
                                                   "(was the file rewritten?)", "header_changed")
                return self._empty(self.offset)
            header, data_start, header_lines = found
            eol = self._eol
            if self._offset < data_start:
                self._offset = data_start
                self._lines_before = header_lines
            elif self.offset > data_start:
                f.seek(self.offset - 1)
                if f.read(1) != bytes([eol]):
                    raise InputProblem(self.shown, f"byte {self.offset - 1} is no longer the end of a "
                                                   "line (was the file rewritten?)", "rewritten")
            start = self.offset
            f.seek(start)
            piece = f.read(limit)
            read_len = len(piece)
            last_nl = piece.rfind(eol)
            if last_nl < 0 and len(piece) == limit and start + limit < size:
                # One line longer than the piece: read it whole if it is within the line limit.
                f.seek(start)
                piece = f.read(max(limit, self.limits.max_line_bytes))
                read_len = len(piece)
                end = piece.find(eol)
                if end < 0:
                    if len(piece) < self.limits.max_line_bytes:
                        return self._empty(start)            # the line is not complete yet
                    return self._skip_long_line(f, start, header)
                piece = piece[: end + 1]
                last_nl = end
            if eol == _CR:
                lf = piece.find(b"\n")
                if lf >= 0:
                    last_cr = piece.rfind(b"\r", 0, lf)
                    if last_cr < 0:  # the next line ends with an LF: it would never be complete
                        raise self._mixed_line_ends(start + lf)
                    last_nl = last_cr  # the lines before it are good; the LF is reported next read
                    read_len = max(read_len, limit)
            if last_nl < 0:
                return self._empty(start)
            data = piece[: last_nl + 1]
            self._batch_start = (start, self.position, self.last_draw)
            batch = self._parse(data, start, header)
            self._offset = start + len(data)
            if self._lines_before is not None:
                self._lines_before += data.count(eol)
            batch.more = read_len >= limit and self.offset < size
            return batch

    def _mixed_line_ends(self, at: int) -> InputProblem:
        return InputProblem(self.shown, f"byte {at} is an LF, but this file's line ends are lone CRs (its "
                                        "first line end); a file must keep one style (docs/input-format.md)",
                            "line_ends")

    def _empty(self, offset: int, problems=None, end: int | None = None, more: bool = False) -> Batch:
        h = self.header
        shape = h.obs_shape if h is not None else ()
        return Batch(np.empty((0, h.n if h else 0)), np.empty((0, len(h.param_names) if h else 0)), None,
                     h.param_names if h else (), offset, offset if end is None else end, problems or [],
                     self.shown, more, np.empty(0, dtype=np.int64), 0, self.position, self.position,
                     self.last_draw, shape)

    # ---------------------------------------------------------------------------------------------

    def _read_header(self, f, size: int) -> tuple[Header, int, int] | None:
        """Find the header (first line neither blank nor a comment) → (header, data start, lines)."""
        if self._header_raw is not None and size >= len(self._header_raw):
            f.seek(0)
            if f.read(len(self._header_raw)) == self._header_raw:
                return self.header, len(self._header_raw), self._header_lines
        cap = self.limits.max_header_bytes
        f.seek(0)
        buf = bytearray()
        pos = 0                      # start of the next line in buf
        lines = 0
        eol = None
        while True:
            if eol is None:
                i_n, i_r = buf.find(b"\n", pos), buf.find(b"\r", pos)
                if i_r >= 0 and (i_n < 0 or i_r < i_n):
                    if i_r + 1 < len(buf):
                        eol = _NL if buf[i_r + 1] == _NL else _CR
                    elif len(buf) >= size:
                        return None                    # a lone CR so far: CR or CRLF not yet known
                elif i_n >= 0:
                    eol = _NL
            end = buf.find(bytes([eol]), pos) if eol is not None else -1
            if eol == _CR:
                lf = buf.find(b"\n", pos, end if end >= 0 else len(buf))
                if lf >= 0:
                    raise self._mixed_line_ends(lf)
            if end < 0:
                if len(buf) > cap:
                    raise InputProblem(self.shown, f"no complete header line in the first {cap} bytes "
                                                   "(max_header_bytes)", "limit_exceeded")
                more = f.read(min(1 << 20, cap + 1 - len(buf)))
                if not more:
                    return None
                buf += more
                continue
            line = bytes(buf[pos:end])
            lines += 1
            pos = end + 1
            stripped = line.strip()
            if not stripped or stripped.startswith(b"#"):
                continue
            break
        self._eol = eol
        raw = bytes(buf[:pos])
        header = parse_header(line, self.path, self.options, self.limits)
        if self.header is not None and header.names != self.header.names:
            raise InputProblem(self.shown, "the header is not the one recorded when reading started "
                                           f"(now {header.n} observations, parameters "
                                           f"{list(header.param_names)[:5]}; was {self.header.n} and "
                                           f"{list(self.header.param_names)[:5]})", "header_changed")
        self.header = header
        self._header_raw = raw
        self._header_lines = lines
        return header, pos, lines

    def _line_number(self, lines_in_piece: int) -> int:
        """1-based line number of a line, given the line ends before it inside the current piece."""
        if self._lines_before is None:
            count = 0
            eol = bytes([self._eol or _NL])
            try:
                with open_regular(self.path) as g:
                    remaining = self.offset
                    while remaining > 0:
                        chunk = g.read(min(remaining, 1 << 20))
                        if not chunk:
                            break
                        count += chunk.count(eol)
                        remaining -= len(chunk)
            except InputProblem:
                pass
            self._lines_before = count
        return self._lines_before + lines_in_piece + 1

    def _skip_long_line(self, f, start: int, header: Header) -> Batch:
        """A line longer than the line limit: find its end without holding it, skip it, report it."""
        eol = bytes([self._eol])
        pos = start
        f.seek(start)
        while True:
            chunk = f.read(1 << 20)
            if not chunk:
                return self._empty(start)                         # no end yet
            i = chunk.find(eol)
            if i >= 0:
                end = pos + i + 1
                break
            pos += len(chunk)
        line_no = self._line_number(0)
        problem = InputProblem(self.shown, f"line {line_no} (byte {start}) is {end - start} bytes long, more "
                                           f"than the limit of {self.limits.max_line_bytes} (max_line_bytes); "
                                           "skipped", "limit_exceeded")
        self._offset = end
        self._lines_before = line_no
        return self._empty(start, [problem], end, True)

    def _parse(self, data: bytes, start: int, header: Header) -> Batch:
        """Parse complete lines (``data`` ends with a line end) with numpy, keeping every good row."""
        if self._eol == _CR:
            data = data.replace(b"\r", b"\n")      # same length: offsets and line numbers unchanged
        arr = np.frombuffer(data, dtype=np.uint8)
        ends = np.flatnonzero(arr == _NL)                    # index of each line's newline
        starts = np.empty_like(ends)
        starts[0] = 0
        starts[1:] = ends[:-1] + 1
        commas = np.diff(np.searchsorted(np.flatnonzero(arr == _COMMA), ends), prepend=0)
        lead = arr[starts]                                   # first byte of each line
        data_line = (lead > 32) & (lead != _HASH)
        for i in np.flatnonzero(lead <= 32):                 # blank, or indented: look past the spaces
            text = data[starts[i]: ends[i]].strip()
            data_line[i] = bool(text) and not text.startswith(b"#")
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
            problems.append(InputProblem(self.shown, f"line {line_no} (byte {start + int(starts[i])}) "
                                                     f"{text}; row skipped", kind))
        if n_skipped > MAX_ROW_PROBLEMS:
            problems.append(InputProblem(self.shown, f"{n_skipped - MAX_ROW_PROBLEMS} more rows skipped "
                                                     f"between bytes {start} and {start + len(data)}",
                                         "bad_row"))
        values = values[ok]
        kept_lines = good_idx[ok]
        loglik = values[:, list(header.loglik_cols)]
        params = values[:, list(header.param_cols)]
        draw_ids = None
        if header.draw_col is not None:
            draw_ids = values[:, header.draw_col].astype(np.int64)

        def line_label(r: int) -> str:
            return f"line {self._line_number(int(kept_lines[r]))}"

        (loglik, params, draw_ids, positions, warmup_rows, end_position, last_draw,
         order_problems, rows_kept) = _select_draws(self.shown, loglik, params, draw_ids, line_label, self.options,
                                         self.position, self.last_draw)
        problems += order_problems
        start_position = self.position
        self.position, self.last_draw = end_position, last_draw
        if loglik.shape[0]:
            if draw_ids is not None:
                def labels(r: int) -> str:
                    return f"draw {draw_ids[r]}"
            else:
                def labels(r: int) -> str:
                    return line_label(int(rows_kept[r]))
            problems += _nonfinite_problems(self.shown, loglik, labels, "the log-likelihood",
                                            _observation_namer(header.obs_shape))
            problems += _nonfinite_problems(self.shown, params, labels, "a parameter value",
                                            lambda c: header.param_names[c])
        return Batch(loglik, params, draw_ids, header.param_names, start, start + len(data),
                     problems, self.shown, False, positions, warmup_rows, start_position, end_position,
                     last_draw, header.obs_shape)

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
                return f"has {shown[:40]!r} in column {name[:80]!r}, which is not a number"
        return "has a field that is not a number"


# --------------------------------------------------------------------------------------------------
# NPZ

_NPZ_KINDS_OK = {"loglik": "f", "params": "fiub", "param_names": "U", "draw": "iu"}
_NPZ_KIND_WORDS = {"loglik": "floating point", "params": "numbers", "param_names": "fixed-width unicode",
                   "draw": "integers"}
_ZIP_ENCRYPTED = 0x1


def _npz_problem(path: str, exc: BaseException) -> InputProblem:
    if isinstance(exc, InputProblem):
        return exc
    if isinstance(exc, zlib.error):
        return InputProblem(path, f"a compressed array in the NPZ archive is corrupt ({exc})", "corrupt_npz")
    if isinstance(exc, zipfile.BadZipFile) and "CRC" in str(exc):
        return InputProblem(path, f"an array in the NPZ archive fails its checksum ({exc})", "corrupt_npz")
    return InputProblem(path, f"the NPZ archive is incomplete or damaged ({exc})", "truncated_npz")


def _read_member(path: str, zf: zipfile.ZipFile, info: zipfile.ZipInfo, key: str,
                 limits: ReaderLimits) -> np.ndarray:
    """Read one ``.npy`` member after checking its zip entry and array header against the limits.

    Checked before any data is decompressed: the encryption flag, the compression method (stored or
    deflate only), the declared uncompressed size, the dtype (no objects, only the kinds the array may
    have) and the declared shape's byte count. The data is then read as a capped stream into a buffer
    of exactly the declared size.
    """
    if info.flag_bits & _ZIP_ENCRYPTED:
        raise InputProblem(path, f"array {key!r} is encrypted in the NPZ archive; not read", "bad_npz")
    if info.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED):
        raise InputProblem(path, f"array {key!r} uses compression method {info.compress_type}; only stored "
                                 "and deflate members are read", "bad_npz")
    cap = limits.max_member_bytes
    if info.file_size > cap + 65536:
        raise InputProblem(path, f"array {key!r} declares {info.file_size} bytes unpacked, more than the "
                                 f"limit of {cap} (max_member_bytes); write smaller chunks (fewer draws per "
                                 "chunk file)", "limit_exceeded")
    with zf.open(info) as fp:
        try:
            version = np.lib.format.read_magic(fp)
            if version not in ((1, 0), (2, 0)):
                raise ValueError(f".npy format version {version} is not read")
            if version == (1, 0):
                shape, fortran, dtype = np.lib.format.read_array_header_1_0(fp)
            else:
                shape, fortran, dtype = np.lib.format.read_array_header_2_0(fp)
        except ValueError as exc:
            raise InputProblem(path, f"the header of array {key!r} is malformed ({exc})", "bad_npz") from None
        if dtype.hasobject:
            raise InputProblem(path, f"array {key!r} holds Python objects (pickled data); such chunks are "
                                     "never loaded", "pickled_npz")
        if dtype.kind not in _NPZ_KINDS_OK[key] or dtype.fields is not None or dtype.subdtype is not None:
            raise InputProblem(path, f"{key!r} has dtype {dtype}; expected {_NPZ_KIND_WORDS[key]}",
                               "bad_npz")
        if dtype.itemsize == 0:
            raise InputProblem(path, f"{key!r} has dtype {dtype} of zero width", "bad_npz")
        count = math.prod(shape)
        nbytes = count * dtype.itemsize
        if nbytes > cap:
            fit = ""
            if len(shape) == 2 and shape[1] > 0:  # (draws, columns): say how many draws per chunk fit
                fit = (f"; at {shape[1]:,} columns a chunk holds at most {cap // (shape[1] * dtype.itemsize):,} "
                       "draws: write smaller chunks")
            raise InputProblem(path, f"array {key!r} declares shape {shape} of {dtype}, {nbytes} bytes, more "
                                     f"than the limit of {cap} (max_member_bytes){fit}", "limit_exceeded")
        header_len = fp.tell()
        if info.file_size != header_len + nbytes:
            raise InputProblem(path, f"array {key!r} declares shape {shape} ({nbytes} bytes) but its zip entry "
                                     f"holds {info.file_size - header_len} bytes of data", "bad_npz")
        out = np.empty(shape, dtype=dtype, order="F" if fortran else "C")
        view = memoryview(out.reshape(-1, order="A").view(np.uint8)) if nbytes else memoryview(b"")
        got = 0
        while got < nbytes:
            step = fp.readinto(view[got: got + (8 << 20)])
            if not step:
                raise InputProblem(path, f"array {key!r} ends after {got} of {nbytes} bytes", "truncated_npz")
            got += step
        if fp.read(1):
            raise InputProblem(path, f"array {key!r} has more data than its shape {shape}", "bad_npz")
    return out


def load_npz_chunk(path: str | os.PathLike, n_expected: int | None = None,
                   param_names_expected: Sequence[str] | None = None, *, options: ReadOptions | None = None,
                   limits: ReaderLimits | None = None, position: int = 0,
                   last_draw: int | None = None) -> Batch:
    """Load one NPZ chunk of draws.

    Arrays: ``loglik`` (the name is ``options.loglik``; draws × n, or draws × I × J flattened row-major to
    draws × (I·J); floating point; required), ``params`` (draws × p, numeric), ``param_names`` (p,
    fixed-width unicode), ``draw`` (draws, integer). Other arrays are ignored. No pickle is ever loaded:
    every member's zip entry and ``.npy`` header are checked (encryption, compression method, dtype,
    declared shape and size against ``limits``) before its data is decompressed, as a capped stream.
    ``params``/``param_names`` columns not chosen by ``options.params``/``ignore`` are dropped (only when
    names are given). ``position``/``last_draw``: the chain's draws passed so far and its highest draw
    number (for warm-up, thinning and the draw order, as in :class:`CsvChainReader`).

    Raises InputProblem with kind ``'not_npz'``, ``'truncated_npz'``, ``'corrupt_npz'``, ``'pickled_npz'``,
    ``'bad_npz'``, ``'limit_exceeded'``, ``'n_mismatch'`` (``n_expected`` given and different),
    ``'header_changed'`` (parameter names different from ``param_names_expected``), ``'not_regular'`` or
    ``'unreadable'``. NaN/±inf values are kept and reported as ``'bad_values'`` in ``Batch.problems``.
    """
    shown = _shown_path(path)
    options = options if options is not None else ReadOptions()
    limits = limits if limits is not None else DEFAULT_LIMITS
    lname = options.loglik
    with open_regular(path, "chunk file") as f:
        size = os.fstat(f.fileno()).st_size
        if size == 0:
            raise InputProblem(shown, "the chunk file is empty", "truncated_npz")
        magic = f.read(4)
        if magic[:2] != b"PK":
            what = "a single .npy array" if magic.startswith(b"\x93NUM") else "not a zip archive"
            raise InputProblem(shown, f"not an NPZ archive ({what})", "not_npz")
        f.seek(0)
        try:
            with zipfile.ZipFile(f) as zf:
                infos = zf.infolist()
                if len(infos) > limits.max_npz_members:
                    raise InputProblem(shown, f"the NPZ archive has {len(infos)} members, more than the limit "
                                              f"of {limits.max_npz_members} (max_npz_members)", "limit_exceeded")
                by_key = {i.filename[:-4]: i for i in infos if i.filename.endswith(".npy")}
                if lname not in by_key:
                    raise InputProblem(shown, f"the chunk has no array named {lname!r} "
                                              f"(found {sorted(by_key)[:10] or 'none'})", "bad_npz")
                readable = (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED)
                for member, info in sorted(by_key.items()):
                    if member in (lname, "params", "param_names", "draw"):
                        continue
                    if info.flag_bits & _ZIP_ENCRYPTED or info.compress_type not in readable:
                        continue                     # never read: cannot hide a pickle from us
                    try:
                        with zf.open(info) as fp:
                            version = np.lib.format.read_magic(fp)
                            dtype = (np.lib.format.read_array_header_1_0(fp) if version == (1, 0)
                                     else np.lib.format.read_array_header_2_0(fp))[2]
                    except (ValueError, zipfile.BadZipFile, zlib.error, EOFError, OSError):
                        continue                     # an array that is not used and not readable
                    if dtype.hasobject:
                        raise InputProblem(shown, f"array {member!r} holds Python objects (pickled data); "
                                                  "such chunks are never loaded", "pickled_npz")
                arrays = {}
                for key, want in (("loglik", lname), ("params", "params"), ("param_names", "param_names"),
                                  ("draw", "draw")):
                    if want in by_key:
                        arrays[key] = _read_member(shown, zf, by_key[want], key, limits)
        except (InputProblem, zipfile.BadZipFile, zlib.error, EOFError, OSError, ValueError,
                NotImplementedError, RuntimeError) as exc:
            raise _npz_problem(shown, exc) from None

    loglik = arrays["loglik"]
    if loglik.ndim == 3:
        obs_shape: tuple[int, ...] = (int(loglik.shape[1]), int(loglik.shape[2]))
        loglik = loglik.reshape(loglik.shape[0], -1)            # row-major: [i, j] at (i-1)*J + (j-1)
    elif loglik.ndim == 2:
        obs_shape = (int(loglik.shape[1]),)
    else:
        raise InputProblem(shown, f"{lname!r} has shape {loglik.shape}; expected (draws, n) or (draws, I, J)",
                           "bad_npz")
    draws, n = loglik.shape
    if n == 0:
        raise InputProblem(shown, f"{lname!r} has no observations (shape {arrays['loglik'].shape})", "bad_npz")
    if n_expected is not None and n != n_expected:
        raise InputProblem(shown, f"{lname!r} has {n} observations; this chain has {n_expected}", "n_mismatch")
    loglik = np.ascontiguousarray(loglik, dtype=np.float64)

    params = arrays.get("params")
    names_arr = arrays.get("param_names")
    if params is None:
        if names_arr is not None and names_arr.size:
            raise InputProblem(shown, "'param_names' is given but there is no 'params' array", "bad_npz")
        params = np.empty((draws, 0))
    else:
        if params.ndim != 2 or params.shape[0] != draws:
            raise InputProblem(shown, f"'params' has shape {params.shape}; expected ({draws}, p)", "bad_npz")
        params = np.ascontiguousarray(params, dtype=np.float64)
    p = params.shape[1]
    if names_arr is not None:
        if names_arr.ndim != 1:
            raise InputProblem(shown, f"'param_names' has dtype {names_arr.dtype} and shape "
                                      f"{names_arr.shape}; expected a 1-D fixed-width unicode array", "bad_npz")
        names = tuple(str(s) for s in names_arr)
        if len(names) != p:
            raise InputProblem(shown, f"'param_names' has {len(names)} names for {p} parameter columns", "bad_npz")
        if len(set(names)) != len(names) or not all(names):
            raise InputProblem(shown, "'param_names' has empty or repeated names", "bad_npz")
        chosen = [j for j, nm in enumerate(names) if options.is_param(nm)]
        if len(chosen) != p:
            params = np.ascontiguousarray(params[:, chosen])
            names = tuple(names[j] for j in chosen)
    elif param_names_expected is not None and len(param_names_expected) == p:
        names = tuple(param_names_expected)
    else:
        names = tuple(f"param[{j}]" for j in range(1, p + 1))
    if param_names_expected is not None and tuple(param_names_expected) != names:
        raise InputProblem(shown, f"parameter names {list(names)[:5]} differ from this chain's "
                                  f"{list(param_names_expected)[:5]}", "header_changed")

    draw_ids = arrays.get("draw")
    if draw_ids is not None:
        if draw_ids.ndim != 1 or draw_ids.shape[0] != draws:
            raise InputProblem(shown, f"'draw' has shape {draw_ids.shape} and dtype {draw_ids.dtype}; "
                                      f"expected ({draws},) integers", "bad_npz")
        if draw_ids.dtype.kind == "u" and draws and draw_ids.max() >= 2**63:
            raise InputProblem(shown, "'draw' has numbers of 2^63 or more", "bad_npz")
        draw_ids = draw_ids.astype(np.int64)

    def row_label(r: int) -> str:
        return f"row {r + 1} of the chunk"

    (loglik, params, draw_ids, positions, warmup_rows, end_position, last_draw,
     problems, rows_kept) = _select_draws(shown, loglik, params, draw_ids, row_label, options, position, last_draw)

    def labels(r: int) -> str:
        return f"draw {draw_ids[r]}" if draw_ids is not None else f"row {rows_kept[r] + 1} of the chunk"

    problems += _nonfinite_problems(shown, loglik, labels, "the log-likelihood", _observation_namer(obs_shape))
    problems += _nonfinite_problems(shown, params, labels, "a parameter value", lambda c: names[c])
    return Batch(loglik, params, draw_ids, names, 0, size, problems, shown, False, positions, warmup_rows,
                 position, end_position, last_draw, obs_shape)


def pending_chunks(chunk_dir: str | os.PathLike, taken: Iterable[str]) -> list[str]:
    """Names of the ``*.npz`` chunks in ``chunk_dir`` not in ``taken``, in name order.

    Hidden files (temporary names such as ``.00000003.npz.tmp``) and anything that is not a regular
    file (including symbolic links, FIFOs and sockets) are left out. A missing folder has no chunks.
    Only the new names are looked at (a set difference over the folder's names), so a folder of many
    taken chunks costs one listing, not one ``stat`` per chunk.
    """
    if not isinstance(taken, (set, frozenset)):
        taken = set(taken)
    try:
        listed = os.listdir(chunk_dir)
    except OSError:
        return []
    names = []
    for name in set(listed).difference(taken):
        if not name.endswith(".npz") or name.startswith("."):
            continue
        if _regular_file(os.path.join(chunk_dir, name)):
            names.append(name)
    return sorted(names)


def _regular_file(path: str) -> bool:
    try:
        return stat.S_ISREG(os.stat(path, follow_symlinks=False).st_mode)
    except OSError:
        return False


#: Entries of a chunk folder looked at per scan on average: a larger folder is listed in full (its
#: contents checked, the taken chunks' identities compared) every ``entries // FULL_LISTING_BATCH``
#: passes, and in between only the next names of its numbered series are looked up.
FULL_LISTING_BATCH = 64

_NUMBERED_CHUNK = re.compile(r"(\d+)\.npz")


def next_chunks(chunk_dir: str | os.PathLike, last: str | None, taken: Iterable[str] = ()) -> list[str] | None:
    """The chunks that follow ``last`` in a numbered series (``00000041.npz``, ``00000042.npz``, ...),
    found by looking up each next name in turn (one ``stat`` per new chunk, none per old one).

    Returns the names found (possibly none), or None when ``last`` is not a numbered name, so the
    series cannot be followed and the caller lists the folder (:func:`pending_chunks`).  A name of
    another width than ``last`` ends the series (it would sort elsewhere).
    """
    match = _NUMBERED_CHUNK.fullmatch(last or "")
    if match is None:
        return None
    width, number = len(match.group(1)), int(match.group(1))
    found = []
    while True:
        number += 1
        name = f"{number:0{width}d}.npz"
        if len(name) != width + 4 or name in taken or not _regular_file(os.path.join(chunk_dir, name)):
            return found
        found.append(name)


# --------------------------------------------------------------------------------------------------
# run.json


class RunInfo(dict):
    """The checked fields of a ``run.json`` (a dict) with ``problems``: one InputProblem per field that
    was dropped (kind ``'bad_run_info'``, or ``'limit_exceeded'``)."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.problems: list[InputProblem] = []


_FIELD_WANTS = {
    "title": "a string of at most 10000 characters",
    "dataset": "a string of at most 10000 characters",
    "observation_labels": "a non-empty list of strings of at most 1000 characters each",
    "n_params": "a whole number from 0 to 1000000000",
    "point_loglik": "a finite number with magnitude at most 1e15",
    "draws_expected": "a whole number from 2 to 1000000000000",
}
MAX_N_PARAMS = 10**9
MAX_DRAWS_EXPECTED = 10**12
MAX_ABS_POINT_LOGLIK = 1e15
TARGET_RANGE = (1e-12, 1e12)
"""A numeric target is 0 or has magnitude within this range."""


def _target_problem(name, v) -> str | None:
    if not isinstance(name, str) or not 0 < len(name) <= 100:
        return f"target name {_shown_value(name)} must be a string of 1 to 100 characters"
    if v is None or isinstance(v, bool) or (isinstance(v, str) and len(v) <= 1000):
        return None
    if _is_number(v):
        if not math.isfinite(v):
            return f"target {name!r} is {v!r}; a target must be finite"
        if v != 0 and not TARGET_RANGE[0] <= abs(v) <= TARGET_RANGE[1]:
            return (f"target {name!r} is {v!r}, outside the range a target can have "
                    f"(0 or magnitude {TARGET_RANGE[0]:g} to {TARGET_RANGE[1]:g})")
        return None
    return f"target {name!r} must be a number, a string, true/false or null, got {_shown_value(v)}"


def check_run_info(info, path: str | os.PathLike = RUN_INFO_NAME, limits: ReaderLimits | None = None) -> RunInfo:
    """Check the fields of a run description (docs/input-format.md) one by one.

    Known fields: ``title``, ``dataset`` (str), ``observation_labels`` ([str], non-empty), ``n_params``
    (int, 0..1e9), ``draws_expected`` (int, 2..1e12: post-warm-up draws of all chains the run is planned
    to reach), ``point_loglik`` (finite float, |v| <= 1e15), ``targets`` ({name: number|str|bool|null},
    numbers 0 or 1e-12 <= |v| <= 1e12), and the read options ``loglik`` (str), ``warmup`` (int >= 0),
    ``thin`` (int >= 1), ``params``/``ignore`` ([pattern]). A field of the wrong type or out of range is
    dropped with a problem in :attr:`RunInfo.problems`; a bad target entry drops only that entry. Unknown
    keys are dropped silently. Raises InputProblem ``'bad_run_info'`` when ``info`` is not an object.
    """
    shown = _shown_path(path)
    limits = limits if limits is not None else DEFAULT_LIMITS
    if not isinstance(info, dict):
        raise InputProblem(shown, f"the run description must be a JSON object, not {type(info).__name__}",
                           "bad_run_info")
    out = RunInfo()

    def drop(key: str, text: str, kind: str = "bad_run_info") -> None:
        out.problems.append(InputProblem(shown, f"{text}; field {key!r} ignored", kind))

    for key, v in info.items():
        if key in ("title", "dataset"):
            if isinstance(v, str) and len(v) <= 10000:
                out[key] = v
            else:
                drop(key, f"{key!r} must be {_FIELD_WANTS[key]}, got {_shown_value(v)}")
        elif key == "observation_labels":
            if isinstance(v, list) and len(v) > limits.max_labels:
                drop(key, f"'observation_labels' has {len(v)} labels, more than the limit of "
                          f"{limits.max_labels} (max_labels)", "limit_exceeded")
            elif isinstance(v, list) and v and all(isinstance(s, str) and len(s) <= 1000 for s in v):
                out[key] = list(v)
            else:
                drop(key, f"'observation_labels' must be {_FIELD_WANTS[key]}, got {_shown_value(v)}")
        elif key == "n_params":
            if _is_int(v) and 0 <= v <= MAX_N_PARAMS:
                out[key] = v
            else:
                drop(key, f"'n_params' must be {_FIELD_WANTS[key]}, got {_shown_value(v)}")
        elif key == "draws_expected":
            if _is_int(v) and 2 <= v <= MAX_DRAWS_EXPECTED:
                out[key] = v
            else:
                drop(key, f"'draws_expected' must be {_FIELD_WANTS[key]}, got {_shown_value(v)}")
        elif key == "point_loglik":
            if _is_number(v) and math.isfinite(v) and abs(v) <= MAX_ABS_POINT_LOGLIK:
                out[key] = float(v)
            else:
                drop(key, f"'point_loglik' must be {_FIELD_WANTS[key]}, got {_shown_value(v)}")
        elif key == "targets":
            if not isinstance(v, dict):
                drop(key, f"'targets' must be an object of names to numbers, strings, true/false or null, "
                          f"got {_shown_value(v)}")
            elif len(v) > limits.max_targets:
                drop(key, f"'targets' has {len(v)} entries, more than the limit of {limits.max_targets} "
                          "(max_targets)", "limit_exceeded")
            else:
                kept = {}
                for name, value in v.items():
                    problem = _target_problem(name, value)
                    if problem:
                        out.problems.append(InputProblem(shown, f"{problem}; that target ignored", "bad_run_info"))
                    else:
                        kept[name] = value
                out[key] = kept
        elif key in ("loglik", "warmup", "thin", "params", "ignore"):
            if key in ("params", "ignore") and isinstance(v, list) and len(v) > limits.max_patterns:
                drop(key, f"{key!r} has {len(v)} patterns, more than the limit of {limits.max_patterns} "
                          "(max_patterns)", "limit_exceeded")
                continue
            problem = _option_problem(key, v)
            if problem:
                drop(key, problem)
            else:
                out[key] = list(v) if isinstance(v, list) else v
    return out


def validate_run_info(info) -> dict:
    """Strict form of :func:`check_run_info` (for writers): the checked fields, or ValueError naming the
    first field that is wrong."""
    try:
        checked = check_run_info(info, "<run description>")
    except InputProblem as problem:
        raise ValueError(problem.problem) from None
    if checked.problems:
        raise ValueError(checked.problems[0].problem)
    return dict(checked)


def _json_depth(value, limit: int) -> int:
    """Nesting depth of arrays/objects (iterative; stops counting past ``limit``)."""
    deepest = 0
    stack = [(value, 1)]
    while stack:
        v, d = stack.pop()
        if isinstance(v, (dict, list)):
            deepest = max(deepest, d)
            if deepest > limit:
                return deepest
            stack.extend((c, d + 1) for c in (v.values() if isinstance(v, dict) else v))
    return deepest


def read_run_info(path: str | os.PathLike, limits: ReaderLimits | None = None) -> RunInfo:
    """Read and check ``run.json``; see :func:`check_run_info` for the fields.

    Returns a :class:`RunInfo` (a dict) whose ``problems`` name each field dropped. Raises InputProblem
    ``'bad_run_info'`` for text that is not JSON (perhaps still being written: try again later) or not an
    object, ``'limit_exceeded'`` for a file larger than ``limits.max_run_info_bytes`` or nested deeper than
    ``limits.max_json_depth``, ``'not_regular'``/``'unreadable'`` when it cannot be read.
    """
    shown = _shown_path(path)
    limits = limits if limits is not None else DEFAULT_LIMITS
    with open_regular(path, "run description") as f:
        try:
            raw = f.read(limits.max_run_info_bytes + 1)
        except OSError as exc:
            raise InputProblem(shown, f"cannot read the file ({exc.strerror or exc})", "unreadable") from None
    if len(raw) > limits.max_run_info_bytes:
        raise InputProblem(shown, f"the file is larger than the limit of {limits.max_run_info_bytes} bytes "
                                  "(max_run_info_bytes)", "limit_exceeded")
    try:
        info = json.loads(raw.decode("utf-8"))
    except RecursionError:
        raise InputProblem(shown, "the JSON is nested too deeply to read (max_json_depth)", "limit_exceeded") from None
    except (UnicodeDecodeError, ValueError) as exc:
        raise InputProblem(shown, f"not valid JSON, perhaps still being written ({str(exc)[:200]})",
                           "bad_run_info") from None
    depth = _json_depth(info, limits.max_json_depth)
    if depth > limits.max_json_depth:
        raise InputProblem(shown, f"the JSON is nested more than {limits.max_json_depth} levels deep "
                                  "(max_json_depth)", "limit_exceeded")
    return check_run_info(info, path, limits)


# --------------------------------------------------------------------------------------------------
# scanning the root


def name_problem(name: str, what: str = "name", limits: ReaderLimits | None = None) -> str | None:
    """Why ``name`` cannot be a run or chain name, or None when the draw store and history can hold it.

    The rule of :func:`chainvigil.storage.draws.check_name` (non-empty; no ``/``, ``\\\\`` or NUL; not
    starting with ``.`` or ``__``) plus: valid UTF-8 on disk, no control characters, not ``zarr.json``
    (the store's metadata file), at most ``limits.max_name_bytes`` UTF-8 bytes.
    """
    limits = limits if limits is not None else DEFAULT_LIMITS
    try:
        encoded = name.encode("utf-8")
    except UnicodeEncodeError:
        return f"the {what} is not valid UTF-8"
    try:
        check_name(name, what)
    except ValueError as exc:
        return str(exc).rsplit(": ", 1)[-1]           # "invalid <what> <name>: <why>" -> why
    if any(ord(c) < 32 or 127 <= ord(c) < 160 for c in name):
        return f"the {what} contains control characters"
    if name == "zarr.json":
        return f"the {what} 'zarr.json' is the draw store's own metadata file"
    if len(encoded) > limits.max_name_bytes:
        return f"the {what} is {len(encoded)} bytes long, more than {limits.max_name_bytes} (max_name_bytes)"
    return None


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
              seen: set | None = None, only: Iterable[str] | None = None,
              limits: ReaderLimits | None = None, listing: dict | None = None) -> RootScan:
    """List the runs under ``root`` and what each holds.

    A run is a folder directly under the root; a chain is a ``<chain>.csv`` regular file or a
    ``<chain>/`` folder of NPZ chunks inside it. The paths in ``ignore`` (the state folder), a folder
    named ``.chainvigil`` directly in the root, the stop signal file and hidden files that cannot be chains
    (temporary files) are skipped silently. Reported and skipped: run and chain names the store cannot
    hold (``'bad_name'``, see :func:`name_problem`; this includes hidden folders and hidden ``.csv``
    files), FIFOs, sockets and devices (``'not_regular'``), symbolic link loops and broken links
    (``'link_loop'``, ``'unreadable'``), links resolving outside the root (``'outside_root'``), and files
    the monitor does not understand (``'not_ours'``; a CSV's header is checked by the reader, not here).

    ``seen``: a set of problem keys; problems whose key is in it are left out and new keys are added,
    so repeated scans report each problem once. ``only``: scan just these run names.

    ``listing``: a dict the caller keeps between scans (chunk folder path -> [scans since its
    contents were checked, entries then]).  With it, the contents of a chunk folder holding more
    than ``FULL_LISTING_BATCH`` entries are checked (FIFOs, links, files that are not chunks) only
    every ``entries // FULL_LISTING_BATCH`` scans, so a scan costs the same however many chunks a
    long run has written (a problem inside a large chunk folder is reported that many scans later
    at most; new chunks themselves are found by the reader, ``next_chunks`` / ``pending_chunks``).
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

    def resolve(entry: os.DirEntry, folder: RunFolder | None) -> os.stat_result | None:
        """The entry's status (links followed), or None when it must not be followed.  The path is
        escaped for a message only when there is a problem (a scan looks at every chunk file)."""
        try:
            real = os.path.realpath(entry.path)
            if real in ignored:
                return None
            if entry.is_symlink() and not _inside(real, root_real):
                report(folder, InputProblem(_shown_path(entry.path), f"symbolic link to "
                                            f"{_shown_path(real)}, outside the watched root; not followed",
                                            "outside_root"))
                return None
            return os.stat(entry.path)
        except OSError as exc:
            if exc.errno == errno.ELOOP:
                report(folder, InputProblem(_shown_path(entry.path), "symbolic link loop; ignored",
                                            "link_loop"))
            else:
                report(folder, InputProblem(_shown_path(entry.path), "cannot look at this entry "
                                            f"({exc.strerror or exc}); ignored", "unreadable"))
            return None

    def bad_name(folder: RunFolder | None, path: str, name: str, what: str) -> bool:
        problem = name_problem(name, what, limits)
        if problem:
            report(folder, InputProblem(_shown_path(path), f"{problem}; ignored", "bad_name"))
        return problem is not None

    wanted = None if only is None else set(only)
    for run_entry in entries(root):
        name = run_entry.name
        if wanted is not None and name not in wanted:
            continue
        if name == STATE_DIR_NAME:
            continue
        st = resolve(run_entry, None)
        if st is None:
            continue
        if not stat.S_ISDIR(st.st_mode):
            if not name.startswith("."):
                what = "file" if stat.S_ISREG(st.st_mode) else _file_type(st.st_mode)
                report(None, InputProblem(_shown_path(run_entry.path), f"a {what} directly in the watched "
                                                                       "root; runs are folders, so it is "
                                                                       "ignored", "not_ours"))
            continue
        if bad_name(None, run_entry.path, name, "run name"):
            continue
        folder = RunFolder(run_entry.path)
        scan[name] = folder
        dirs: dict[str, os.DirEntry] = {}
        for entry in entries(run_entry.path):
            ename = entry.name
            if ename == STOP_SIGNAL_NAME or ename == "REFITS.json":
                continue
            if ename.startswith(".") and not ename.endswith(".csv"):
                try:
                    hidden_dir = entry.is_dir(follow_symlinks=False)
                except OSError:
                    hidden_dir = False
                if not hidden_dir:
                    continue                                  # temporary and editor files
            est = resolve(entry, folder)
            if est is None:
                continue
            shown = _shown_path(entry.path)
            if stat.S_ISDIR(est.st_mode):
                if not bad_name(folder, entry.path, ename, "chain name"):
                    dirs[ename] = entry
            elif not stat.S_ISREG(est.st_mode):
                if ename == RUN_INFO_NAME or ename.endswith(".csv"):
                    report(folder, InputProblem(shown, f"a {_file_type(est.st_mode)}, not a regular file; "
                                                       "not read", "not_regular"))
                else:
                    report(folder, InputProblem(shown, f"a {_file_type(est.st_mode)}, not a chain file; "
                                                       "ignored", "not_ours"))
            elif ename == RUN_INFO_NAME:
                folder.run_info = entry.path
            elif ename.endswith(".csv"):
                if not bad_name(folder, entry.path, ename[:-4], "chain name"):
                    folder.csv_chains[ename[:-4]] = entry.path
            else:
                report(folder, InputProblem(shown, "not a chain file (expected <chain>.csv, a "
                                                   "<chain>/ folder of .npz chunks, or run.json); "
                                                   "ignored", "not_ours"))
        for chain, entry in dirs.items():
            if chain in folder.csv_chains:
                report(folder, InputProblem(_shown_path(entry.path), f"chain {chain!r} is both a CSV file and "
                                                                     "a chunk folder; the folder is ignored",
                                            "not_ours"))
                continue
            folder.npz_chains[chain] = entry.path
            if listing is not None:
                record = listing.setdefault(entry.path, [0, 0])
                record[0] += 1
                if record[0] < record[1] // FULL_LISTING_BATCH:
                    continue  # a large chunk folder: its contents are checked on a schedule
            inner_entries = entries(entry.path)
            if listing is not None:
                listing[entry.path] = [0, len(inner_entries)]
            for inner in inner_entries:
                if inner.name.startswith("."):
                    continue
                try:
                    ist = inner.stat(follow_symlinks=False)
                except OSError:
                    continue
                if stat.S_ISREG(ist.st_mode) and inner.name.endswith(".npz"):
                    continue  # a chunk: the common case, no message to make
                shown = _shown_path(inner.path)
                if stat.S_ISLNK(ist.st_mode):
                    if resolve(inner, folder) is not None:
                        report(folder, InputProblem(shown, "symbolic link in a chunk folder; chunks "
                                                           "must be regular files, ignored", "not_ours"))
                elif not stat.S_ISREG(ist.st_mode):
                    report(folder, InputProblem(shown, f"a {_file_type(ist.st_mode)} in a chunk folder, not "
                                                       "a regular file; ignored", "not_regular"))
                elif not inner.name.endswith(".npz"):
                    report(folder, InputProblem(shown, "not an .npz chunk; ignored", "not_ours"))
    return scan
