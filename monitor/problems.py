"""Problems found in the input a sampler writes (docs/input-format.md).

Every problem names the file it was found in, says in one short sentence what is wrong, and carries a
short machine word (``kind``) the service stores with the event so the history can be filtered by it.
Readers either raise an :class:`InputProblem` (the whole file or chunk cannot be used) or return it in a
batch's ``problems`` list (one row skipped, some values flagged) while keeping everything good.

Kinds used by the readers and the scanner:

============== ==================================================================================
kind           meaning
============== ==================================================================================
not_ours       a file the monitor does not understand (unknown name, CSV with no log-likelihood
               columns)
bad_name       a run or chain name the draw store cannot hold (empty, ``/`` ``\\`` NUL or control
               characters, starting with ``.`` or ``__``, ``zarr.json``, not UTF-8, too long)
not_regular    a FIFO, socket, device or folder where a regular file is expected (never read)
link_loop      a symbolic link that loops
bad_header     a CSV header with gaps, duplicates or mixed styles among its columns
header_changed a CSV whose header is no longer the one recorded when reading started, or an NPZ
               chunk whose parameter names differ from the ones the chain started with
rewritten      an input file that is another one than the one read: a CSV shorter than the part
               read or whose read bytes changed, an NPZ chunk whose content changed after it was
               taken (the service starts a new segment ``<chain>~2``, docs/input-format.md)
name_taken     a chain file named like a later segment of another chain (``a~2.csv`` beside a
               rewritten ``a.csv``): not read, so the two inputs are never mixed
line_ends      a CSV whose line ends are lone CRs (its first line end) with an LF after that: its
               lines before the LF are read, nothing after it
bad_row        a CSV row with the wrong number of fields, or a draw number that is not an integer
non_numeric    a CSV row with a field that is not a number
draw_order     rows (CSV) or draws (NPZ) whose draw number is not above the chain's last one; refused
bad_values     NaN or infinite values (kept, but reported with the draws and observations)
truncated_npz  an NPZ chunk that ends early (a zip archive cut short)
corrupt_npz    an NPZ member whose compressed data is damaged or fails its checksum
not_npz        a file in a chain folder that is not an NPZ archive at all
pickled_npz    an NPZ chunk holding object (pickled) arrays; never loaded
bad_npz        an NPZ chunk without a usable log-likelihood array, with malformed optional arrays, an
               encrypted member or a compression method other than stored/deflate
n_mismatch     a number of observations different from the one the chain started with
outside_root   a symbolic link pointing outside the watched root (never followed)
bad_run_info   a ``run.json`` that is not valid JSON, or one field of the wrong type or range (that
               field is dropped, the others kept)
limit_exceeded a size or count above a :class:`~chainvigil.readers.ReaderLimits` bound (named in the
               message): NPZ member bytes, columns, header/line bytes, run.json size or depth, ...
unreadable     a file the operating system refuses to open or read
============== ==================================================================================
"""

from __future__ import annotations

import os

__all__ = ["InputProblem"]


class InputProblem(Exception):
    """A problem with one input file.

    Attributes
    ----------
    path : str
        The file (or folder) the problem was found in.
    problem : str
        A short sentence saying what is wrong, without the path.
    kind : str
        A short machine word (see the module docstring).
    """

    def __init__(self, path: str | os.PathLike, problem: str, kind: str):
        self.path = os.fspath(path)
        self.problem = problem
        self.kind = kind
        super().__init__(self.path, problem, kind)

    def __str__(self) -> str:
        return f"{self.path}: {self.problem}"

    def __repr__(self) -> str:
        return f"InputProblem({self.path!r}, {self.problem!r}, kind={self.kind!r})"

    @property
    def key(self) -> tuple[str, str]:
        """``(path, kind)``: lets a caller report each problem with a file once."""
        return (self.path, self.kind)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, InputProblem):
            return NotImplemented
        return (self.path, self.problem, self.kind) == (other.path, other.problem, other.kind)

    def __hash__(self) -> int:
        return hash((self.path, self.problem, self.kind))

    def __reduce__(self):
        return (InputProblem, (self.path, self.problem, self.kind))
