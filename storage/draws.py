"""The draw store: every draw of every chain of every run, in a zarr v3 store on local disk.

Layout (zarr v3, ``LocalStore`` rooted at the store folder)::

    <store>/                      root group
      <run>/                      one group per run; attribute ``n`` (observations)
        <chain>/                  one group per chain
          loglik                  float64 (draws, n): pointwise log-likelihood log p(y_i | theta_s)
          params                  float64 (draws, p): parameter draws (p may be 0)

Both arrays grow along the first axis (draws) only.

Chunking
--------
* Along draws: ``chunk_draws`` (default 256) draws per chunk.  Appends are *chunk-aligned*: the store
  buffers incoming blocks in memory and writes only whole chunks, so every chunk file is written once
  and never read back while ingesting.  A misaligned write (a block that starts or ends inside a chunk)
  makes zarr read the chunk, merge and rewrite it; ``bench/ingest_store.py`` measures the difference.
* Along observations: ``chunk_obs`` (default 4096) columns per chunk.  The streaming scorer rebuilds
  its tail buffers in observation blocks (``read_all_loglik(run, start, stop)``: every draw of a few
  thousand observations), which touches only the column chunks overlapping ``[start, stop)``.  With one
  chunk spanning all n columns every block read would decode the whole matrix; with very narrow chunks
  each draw chunk becomes many small files and appends pay per-file overhead.  4096 float64 columns x
  256 draws is an 8 MiB chunk: large enough that per-file cost is small, narrow enough that a rebuild
  block of a few thousand observations reads at most about twice the bytes it needs.  The n columns
  are split into equal chunks no wider than ``chunk_obs`` (n = 10,000 gives three chunks of 3334),
  because zarr stores an edge chunk at full size: 4096-wide chunks over 10,000 columns would put
  23 % padding on disk.

Compression
-----------
Log-likelihood values are essentially random float64 mantissas and compress poorly.  Measured with
``bench/ingest_store.py`` (normal-model log-likelihoods, n = 10,000, 4096 draws): Blosc-LZ4 with
byte shuffle stores 92 % of the raw bytes and Zstd level 1 94 %, while ingest takes about 1.5-2x
(LZ4) and 2-3x (Zstd) as long as no codec.  So the default codec is ``"none"``; ``"lz4"`` and
``"zstd"`` can be chosen when disk matters more than ingest time.

Ingest cost (same bench): chunk-aligned appends run at 0.24-0.32 of ``numpy.save``'s throughput when
both only reach the page cache, and 0.35-0.57 when every file is fsynced.  The floor for this layout
is lower than ``numpy.save`` by construction: each column chunk is a strided slice of the block and
must be copied out before it is written (copy + write of the same chunks by hand runs at about 0.5),
and zarr adds its own per-chunk work on top.  Two costs are removed here: zarr's scan of every chunk
for fill values (``write_empty_chunks`` on, about 10-20 % of ingest time) and the second copy of
buffered rows (one preallocated chunk buffer per chain instead of a list of blocks concatenated at
write time).  Full-width chunks gain about 20-30 % on ingest but make observation-blocked reads
(tail rebuilds, r_eff refreshes) decode whole rows (1.7x slower in the bench).  Misaligned appends
are 1.5-2.4x slower than aligned ones.

Flushing and durability
-----------------------
``append`` keeps the part of the current chunk that is not yet full in memory ("pending" draws).
``flush`` writes that partial chunk so it becomes durable; the service commits its manifest row in
SQLite only after ``flush`` returns (append to zarr, then commit).  Cost: the partial last chunk is
written again at every later flush and once more when it fills, so flushing after every block of b
draws writes each chunk up to ``ceil(chunk_draws / b) + 1`` times instead of once.  Flush at the
cadence the history needs (each snapshot), not after every block.

With ``durable=True`` every ``flush`` also ``fsync``s the chunk and metadata files written for that
chain since its last flush, and the folders holding them, before it returns, so a manifest row
committed after the flush describes draws that survive a power loss (``--durable``; its cost is
measured in ``bench/ingest_store.py``).  Without it the files reach the page cache only: a killed
process loses nothing, a power cut may lose or damage the newest chunks.

A write that fails (disk full, I/O error, permission) raises ``OSError`` and leaves the chain as it
was before the call: ``append`` and ``flush`` either complete or change nothing the store reports
(its length, its pending draws, the chunk buffer), so the caller can retry the same draws later.

On start the service calls ``truncate(run, chain, committed_draws)``: anything zarr holds beyond the
committed length (flushed but never committed, or a resize that a crash interrupted) is cut away, and
pending draws of a crashed process were never on disk at all.

Retention
---------
``drop_before(run, chain, position)`` releases the log-likelihood chunks of a chain below a chunk
boundary (their files are deleted, about 8 bytes per draw per observation), keeping the array
length, the draw positions, every parameter draw and the draw numbers; the first readable position
is the chain attribute ``kept_from``, and reading below it raises ``ValueError``.  The caller drops
only committed draws whose information it keeps elsewhere (for PSIS: the smallest log-likelihoods
per observation and the body sums; see the scorer).  The service does so with ``watch --keep-draws
tail|none`` after each checkpoint it writes, and ``prune`` for finished runs (docs/storage.md,
"Retention"); measured with ``bench/retention.py``: 8.01 bytes per draw per observation kept by
``all``, a flat window by ``tail``, only parameter draws and draw numbers by ``none``.

Names
-----
Run and chain names become zarr paths.  They must be non-empty, contain no ``/``, ``\\`` or NUL, not
start with ``.`` (this also excludes ``.`` and ``..``) and not start with ``__`` (reserved by zarr v3),
so every node stays inside the store folder.  A bad name raises ``ValueError`` naming it.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import zarr
from zarr.storage import LocalStore

__all__ = ["DrawStore", "check_name", "fsync_path", "CODECS"]

CODECS = ("none", "lz4", "zstd")


def check_name(name, what: str = "name") -> str:
    """Return ``name`` if it is safe as a zarr node name, else raise ``ValueError`` naming it."""
    if not isinstance(name, str):
        raise ValueError(f"{what} must be a string, got {type(name).__name__} {name!r}")
    problem = None
    if name == "":
        problem = "it is empty"
    elif "/" in name or "\\" in name:
        problem = "it contains a path separator"
    elif "\x00" in name:
        problem = "it contains a NUL character"
    elif name.startswith("."):
        problem = "it starts with a dot"
    elif name.startswith("__"):
        problem = "names starting with '__' are reserved by zarr"
    if problem:
        raise ValueError(f"invalid {what} {name!r}: {problem}")
    return name


def fsync_path(path) -> bool:
    """fsync one file or folder; False when it does not exist (nothing was written there)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except FileNotFoundError:
        return False
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
    return True


def _compressors(codec: str):
    if codec == "none":
        return None
    if codec == "lz4":
        return (zarr.codecs.BloscCodec(cname="lz4", clevel=1, shuffle="shuffle", typesize=8),)
    if codec == "zstd":
        return (zarr.codecs.ZstdCodec(level=1),)
    raise ValueError(f"unknown codec {codec!r}: choose one of {', '.join(CODECS)}")


@dataclass
class _Chain:
    """In-memory state of one chain: zarr handles plus the rows of the current (unfilled) chunk."""

    loglik: zarr.Array
    params: zarr.Array
    ids: zarr.Array  # (draws, 1) int64: the draw numbers, to check order and uniqueness
    durable: int  # rows stored in zarr (the arrays' shape[0])
    base: int  # first row of the current chunk: floor(durable / chunk) * chunk at load time
    group: zarr.Group | None = None  # the chain's group (its attributes hold ``kept_from``)
    kept_from: int = 0  # log-likelihood draws below this position were dropped (drop_before)
    # The current chunk: rows [base, base + buffered) are buf_*[:buffered]; allocated on first use
    # (chunk_draws rows each) and reused, so every draw that waits for its chunk is copied once.
    buf_ll: np.ndarray | None = None
    buf_pa: np.ndarray | None = None
    buf_id: np.ndarray | None = None
    buffered: int = 0
    # Files and folders written since the chain's last flush (kept only for a durable store).
    unsynced: set = field(default_factory=set)

    def buffers(self):
        if self.buf_ll is None:
            c = self.loglik.chunks[0]
            self.buf_ll = np.empty((c, self.loglik.shape[1]))
            self.buf_pa = np.empty((c, self.params.shape[1]))
            self.buf_id = np.empty((c, 1), dtype=np.int64)
        return self.buf_ll, self.buf_pa, self.buf_id

    @property
    def total(self) -> int:
        return self.base + self.buffered

    @property
    def pending(self) -> int:
        return self.total - self.durable


class DrawStore:
    """Append-only store of log-likelihood and parameter draws, one zarr group per run.

    Parameters
    ----------
    path : str or Path
        Folder of the zarr store (created if missing).
    chunk_draws : int
        Draws per chunk (first axis); appends are buffered to whole chunks of this size.
    chunk_obs : int
        Largest number of observations per chunk of ``loglik`` (second axis); n is split into
        equal column chunks no wider than this.
    codec : {"none", "lz4", "zstd"}
        Compression of new arrays (see the module docstring for why the default is none).
    durable : bool
        ``flush`` also fsyncs what it and the appends before it wrote (files and their folders).
    """

    def __init__(self, path, *, chunk_draws: int = 256, chunk_obs: int = 4096, codec: str = "none",
                 durable: bool = False):
        if int(chunk_draws) < 1 or int(chunk_obs) < 1:
            raise ValueError(f"chunk sizes must be positive, got chunk_draws={chunk_draws}, "
                             f"chunk_obs={chunk_obs}")
        self.path = Path(path)
        self.chunk_draws = int(chunk_draws)
        self.chunk_obs = int(chunk_obs)
        self.codec = codec
        self.durable = bool(durable)
        self._compressors = _compressors(codec)
        os.makedirs(self.path, exist_ok=True)
        self._root = zarr.open_group(store=LocalStore(str(self.path)), mode="a")
        self._chains: dict[tuple[str, str], _Chain] = {}
        # run -> its chain names as last listed: this instance is the store's only writer (the state
        # folder's lock), and it forgets a run's list whenever it creates or removes one of its chains
        self._chain_names: dict[str, list[str]] = {}

    # ------------------------------------------------------------------ structure

    def runs(self) -> list[str]:
        """Names of the runs in the store, sorted."""
        return sorted(self._root.group_keys())

    def chains(self, run: str) -> list[str]:
        """Names of the chains of ``run``, sorted (empty list for an unknown run)."""
        check_name(run, "run name")
        names = self._chain_names.get(run)
        if names is None:  # a listing costs a few zarr reads; the service asks several times a pass
            names = sorted(self._root[run].group_keys()) if run in self._root else []
            self._chain_names[run] = names
        return list(names)

    def n_obs(self, run: str) -> int | None:
        """Number of observations of ``run`` (None for an unknown run)."""
        check_name(run, "run name")
        if run not in self._root:
            return None
        return int(self._root[run].attrs["n"])

    def _state(self, run: str, chain: str, *, create_n: int | None = None,
               create_p: int = 0) -> _Chain | None:
        key = (run, chain)
        st = self._chains.get(key)
        if st is not None:
            return st
        check_name(run, "run name")
        check_name(chain, "chain name")
        try:
            return self._open_or_create(key, run, chain, create_n, create_p)
        finally:  # it may have created or removed a chain (or failed halfway): list the run afresh
            self._chain_names.pop(run, None)

    def _open_or_create(self, key, run: str, chain: str, create_n: int | None, create_p: int) -> _Chain | None:
        if run in self._root:
            rg = self._root[run]
            run_n = int(rg.attrs["n"])
        else:
            if create_n is None:
                return None
            rg = self._root.create_group(run, attributes={"n": int(create_n)})
            run_n = int(create_n)
        if create_n is not None and create_n != run_n:
            raise ValueError(f"run {run!r}, chain {chain!r}: the block has n={create_n} observations "
                             f"but run {run!r} has n={run_n}")
        if chain in rg and not {"loglik", "params"} <= set(rg[chain].array_keys()):
            # A kill between creating the chain's group and its arrays: no draw of it can have been
            # committed (draws are written only after both arrays exist), so start it afresh.
            del rg[chain]
        created = False
        if chain in rg:
            cg = rg[chain]
            ll, pa = cg["loglik"], cg["params"]
            ids = cg["draw"] if "draw" in cg else self._create_ids(cg, int(ll.shape[0]))
        else:
            if create_n is None:
                return None
            cg = rg.create_group(chain)
            ll = cg.create_array("loglik", shape=(0, run_n), dtype="float64",
                                 chunks=(self.chunk_draws, self._column_chunk(run_n)),
                                 compressors=self._compressors, fill_value=np.nan)
            pa = cg.create_array("params", shape=(0, int(create_p)), dtype="float64",
                                 chunks=(self.chunk_draws, max(1, int(create_p))),
                                 compressors=self._compressors, fill_value=np.nan)
            ids = self._create_ids(cg, 0)
            created = True
        st = self._load(ll, pa, ids)
        st.group = cg
        st.kept_from = int(cg.attrs.get("kept_from", 0))
        if created and self.durable:  # the new groups and arrays: their metadata and folders
            for node in ("", run, f"{run}/{chain}", *(a.path for a in (ll, pa, ids))):
                st.unsynced.add(self.path / node / "zarr.json")
        self._chains[key] = st
        return st

    def _create_ids(self, cg, length: int) -> zarr.Array:
        ids = cg.create_array("draw", shape=(length, 1), dtype="int64", chunks=(self.chunk_draws, 1),
                              compressors=self._compressors, fill_value=-1)
        if length:  # a store written before draw numbers were kept: number the draws 1..length
            ids[:] = np.arange(1, length + 1)[:, None]
        return ids

    def _column_chunk(self, n: int) -> int:
        """Split n columns into equal chunks no wider than ``chunk_obs`` (no padded edge chunk)."""
        n = max(1, int(n))
        parts = -(-n // self.chunk_obs)
        return -(-n // parts)

    @staticmethod
    def _load(ll: zarr.Array, pa: zarr.Array, ids: zarr.Array) -> _Chain:
        # Write every chunk as it is: by default zarr first scans each chunk to skip chunks that
        # hold only the fill value, a full extra pass over the data that never pays off here
        # (a chunk of log-likelihoods is never all NaN).  A runtime setting, not stored on disk.
        # zarr before 3.1.6 has no ``with_config``: the arrays then keep the default, which stores
        # the same values (a skipped all-fill chunk reads back as the fill value), only slower.
        ll, pa, ids = (a.with_config({"write_empty_chunks": True}) if hasattr(a, "with_config") else a
                       for a in (ll, pa, ids))
        durable = int(ll.shape[0])
        if int(pa.shape[0]) != durable or int(ids.shape[0]) != durable:
            # An interrupted flush can leave the arrays at different lengths; keep the common
            # prefix (the service truncates to the committed length right after anyway).
            durable = min(durable, int(pa.shape[0]), int(ids.shape[0]))
            ll.resize((durable, ll.shape[1]))
            pa.resize((durable, pa.shape[1]))
            ids.resize((durable, 1))
        c = ll.chunks[0]
        base = (durable // c) * c
        st = _Chain(loglik=ll, params=pa, ids=ids, durable=durable, base=base)
        if durable > base:  # reload the partial last chunk so later writes cover whole chunks
            k = durable - base
            for buf, arr in zip(st.buffers(), (ll, pa, ids)):
                buf[:k] = arr[base:durable]
            st.buffered = k
        return st

    # ------------------------------------------------------------------ writing

    def append(self, run: str, chain: str, loglik, params=None, draw_ids=None) -> int:
        """Append a block of draws to a chain; returns the chain's length (durable + pending).

        ``loglik`` is (draws, n) and ``params`` (draws, p) or None (p = 0).  ``draw_ids`` (draws,)
        are the draw numbers the sampler gave (default: the position in the chain, from 1); they
        let a reader check that every draw is stored once and in order.  The first append creates
        the run (fixing n) and the chain (fixing p).  Only whole chunks are written; the rest waits
        in memory until the chunk fills or ``flush`` is called.
        """
        ll = np.asarray(loglik)
        if ll.ndim != 2:
            raise ValueError(f"run {run!r}, chain {chain!r}: loglik must be 2-D (draws, n), "
                             f"got shape {ll.shape}")
        if not (np.issubdtype(ll.dtype, np.floating) or np.issubdtype(ll.dtype, np.integer)):
            raise ValueError(f"run {run!r}, chain {chain!r}: loglik must be numeric, got dtype {ll.dtype}")
        draws, n = ll.shape
        if params is None:
            pa = np.empty((draws, 0))
        else:
            pa = np.asarray(params)
            if pa.ndim == 1 and draws == pa.shape[0]:
                pa = pa[:, None]
            if pa.ndim != 2 or pa.shape[0] != draws:
                raise ValueError(f"run {run!r}, chain {chain!r}: params must be (draws, p) with "
                                 f"{draws} draws to match loglik, got shape {pa.shape}")
            if not (np.issubdtype(pa.dtype, np.floating) or np.issubdtype(pa.dtype, np.integer)):
                raise ValueError(f"run {run!r}, chain {chain!r}: params must be numeric, "
                                 f"got dtype {pa.dtype}")
        st = self._state(run, chain, create_n=n, create_p=pa.shape[1])
        if draw_ids is None:
            ids = np.arange(st.total + 1, st.total + draws + 1, dtype=np.int64)[:, None]
        else:
            ids = np.asarray(draw_ids, dtype=np.int64).reshape(-1, 1)
            if ids.shape[0] != draws:
                raise ValueError(f"run {run!r}, chain {chain!r}: {ids.shape[0]} draw numbers for "
                                 f"{draws} draws")
        if ll.shape[1] != st.loglik.shape[1]:  # cached chain: recheck n
            raise ValueError(f"run {run!r}, chain {chain!r}: the block has n={n} observations "
                             f"but run {run!r} has n={st.loglik.shape[1]}")
        if pa.shape[1] != st.params.shape[1]:
            raise ValueError(f"run {run!r}, chain {chain!r}: the block has p={pa.shape[1]} "
                             f"parameters but the chain has p={st.params.shape[1]}")
        if draws == 0:
            return st.total
        before = (st.base, st.buffered, st.durable, int(st.loglik.shape[0]))
        try:
            return self._append_rows(st, ll, pa, ids, draws)
        except BaseException:
            self._undo(st, before)
            raise

    def _undo(self, st: _Chain, before: tuple) -> None:
        """Put a chain back as it was before a write that failed.

        The rows of the current chunk that were buffered before the call are still intact (a write
        only fills rows after them, or the next chunk's rows after a full chunk was written), so the
        counters are enough; the arrays are cut back to their former length when the disk allows.
        """
        st.base, st.buffered, st.durable, shape0 = before
        try:
            if any(int(a.shape[0]) != shape0 for a in (st.loglik, st.params, st.ids)):
                self._resize(st, shape0)
        except OSError:
            pass  # the arrays stay longer; reads and the next writes go by base/buffered/durable

    def _append_rows(self, st: _Chain, ll, pa, ids, draws: int) -> int:
        # Whole chunks of the block are written straight from the caller's array (no copy); only
        # the rows that complete the current chunk or start the next one are copied, into buf_*.
        c = st.loglik.chunks[0]
        block = (np.asarray(ll, dtype=np.float64), np.asarray(pa, dtype=np.float64), ids)
        head = min(draws, c - st.buffered) if st.buffered else 0
        whole = (draws - head) // c * c if (st.buffered == 0 or st.buffered + head == c) else 0
        stop = st.base + (c if st.buffered + head == c and st.buffered else 0) + whole
        if any(stop > a.shape[0] for a in (st.loglik, st.params, st.ids)):
            self._resize(st, stop)
        if head:
            for buf, b in zip(st.buffers(), block):
                buf[st.buffered:st.buffered + head] = b[:head]
            st.buffered += head
            if st.buffered == c:  # the current chunk is full: write it
                self._put(st, st.buffers(), c)
                st.base += c
                st.buffered = 0
        if whole:
            self._put(st, tuple(b[head:head + whole] for b in block), whole)
            st.base += whole
        rest = draws - head - whole
        if rest:
            for buf, b in zip(st.buffers(), block):
                buf[:rest] = b[head + whole:]
            st.buffered = rest
        st.durable = max(st.durable, st.base)
        return st.total

    def _resize(self, st: _Chain, stop: int) -> None:
        """Set every array of the chain to ``stop`` rows (each is checked: a resize that failed
        half way leaves them at different lengths)."""
        for arr in (st.loglik, st.params, st.ids):
            if int(arr.shape[0]) == stop:
                continue
            arr.resize((stop, arr.shape[1]))
            if self.durable:
                st.unsynced.add(self.path / arr.path / "zarr.json")

    def _put(self, st: _Chain, rows, k: int) -> None:
        """Write ``k`` rows (loglik, params, ids) at [base, base + k); the arrays are long enough."""
        for arr, r in zip((st.loglik, st.params, st.ids), rows):
            if arr.shape[1]:
                arr[st.base:st.base + k] = r[:k]
                if self.durable:
                    st.unsynced.update(self._chunk_files(arr, st.base, st.base + k))

    def _chunk_files(self, arr: zarr.Array, start: int, stop: int) -> list[Path]:
        """The files of ``arr`` holding rows [start, stop) (zarr v3 default keys ``c/<i>/<j>``)."""
        rows, cols = arr.chunks
        folder = self.path / arr.path / "c"
        return [folder / str(i) / str(j) for i in range(start // rows, -(-stop // rows))
                for j in range(-(-int(arr.shape[1]) // cols))]

    def _sync(self, st: _Chain) -> None:
        """fsync the files written since the last sync of this chain and every folder above them
        (a new file or folder is durable only once the folder naming it is)."""
        folders = set()
        for path in sorted(st.unsynced):
            if fsync_path(path):
                folders.update(p for p in path.parents if p == self.path or self.path in p.parents)
        for folder in sorted(folders, key=lambda p: -len(p.parts)):
            fsync_path(folder)
        st.unsynced.clear()

    def flush(self, run: str | None = None, chain: str | None = None) -> None:
        """Make pending draws durable: write the partial last chunk of the chosen chains.

        ``run=None`` flushes every chain this store object has touched; ``chain=None`` every chain
        of ``run``.  See the module docstring for the cost of frequent flushes.
        """
        for (r, c), st in list(self._chains.items()):
            if not ((run is None or r == run) and (chain is None or c == chain)):
                continue
            if st.pending > 0:
                before = (st.base, st.buffered, st.durable, int(st.loglik.shape[0]))
                try:
                    if any(st.total > a.shape[0] for a in (st.loglik, st.params, st.ids)):
                        self._resize(st, st.total)
                    self._put(st, st.buffers(), st.buffered)
                except BaseException:
                    self._undo(st, before)
                    raise
                st.durable = st.total
            if st.unsynced:
                self._sync(st)

    def truncate(self, run: str, chain: str, n_draws: int) -> None:
        """Cut a chain back to ``n_draws`` draws (the committed length), dropping pending draws.

        Raises ``ValueError`` if the store holds fewer durable draws than ``n_draws``.
        """
        n_draws = int(n_draws)
        if n_draws < 0:
            raise ValueError(f"run {run!r}, chain {chain!r}: cannot truncate to {n_draws} draws")
        st = self._state(run, chain)
        if st is None:
            if n_draws == 0:
                return
            raise ValueError(f"run {run!r}, chain {chain!r}: not in the draw store at {self.path}, "
                             f"but {n_draws} draws are committed")
        if n_draws > st.durable:
            raise ValueError(f"run {run!r}, chain {chain!r}: {n_draws} draws are committed but the "
                             f"draw store at {self.path} holds only {st.durable}")
        if n_draws < st.kept_from:
            raise ValueError(f"run {run!r}, chain {chain!r}: cannot truncate to {n_draws} draws, the "
                             f"log-likelihoods below draw position {st.kept_from} were dropped")
        # Cut the arrays whenever they are longer than n_draws, not only when the durable count is:
        # a write that failed may have lengthened them without adding durable draws.
        if any(int(a.shape[0]) != n_draws for a in (st.loglik, st.params, st.ids)):
            self._resize(st, n_draws)
        unsynced = st.unsynced
        self._chains[(run, chain)] = new = self._load(st.loglik, st.params, st.ids)
        new.unsynced = unsynced
        new.group, new.kept_from = st.group, st.kept_from

    def drop(self, run: str, chain: str) -> None:
        """Remove a chain and all its draws (after a power cut left it behind its commit log, the
        service reads it again from its files)."""
        check_name(run, "run name")
        check_name(chain, "chain name")
        self._chains.pop((run, chain), None)
        self._chain_names.pop(run, None)
        if run in self._root and chain in self._root[run]:
            del self._root[run][chain]

    def drop_before(self, run: str, chain: str, position: int) -> int:
        """Release the log-likelihood draws of a chain below ``position``; returns the new start.

        Only whole chunks are released: the start becomes ``position`` rounded down to a multiple
        of ``chunk_draws`` (no chunk is rewritten).  Their chunk files are deleted; the array keeps
        its length, so draw positions, ``length``, ``truncate`` to a later position and the draw
        numbers stay as they were, and parameter draws and draw numbers are all kept.  Reading
        log-likelihoods below the start raises ``ValueError``.  ``position`` may not exceed the
        durable length (only draws already on disk, and so committable, are released).

        Crash safety: the new start is written to the chain's attributes (``kept_from``) before any
        file is deleted, so a kill in between leaves unreadable-but-present files, never rows that
        read as fill values; the next call deletes the leftovers (``dropped_to`` records how far
        deletion got).
        """
        position = int(position)
        st = self._require(run, chain)
        if position < 0 or position > st.durable:
            raise ValueError(f"run {run!r}, chain {chain!r}: cannot drop draws below position {position}: "
                             f"the store holds {st.durable} durable draws")
        c = st.loglik.chunks[0]
        start = max(st.kept_from, position // c * c)
        if start > st.kept_from:
            st.group.attrs["kept_from"] = start
            st.kept_from = start
        done = int(st.group.attrs.get("dropped_to", 0))
        if done < start:
            column_chunks = -(-st.loglik.shape[1] // st.loglik.chunks[1])
            folder = self.path / st.loglik.path
            for i in range(done // c, start // c):
                for j in range(column_chunks):
                    try:
                        os.remove(folder / st.loglik.metadata.encode_chunk_key((i, j)))
                    except FileNotFoundError:
                        pass
            st.group.attrs["dropped_to"] = start
        return st.kept_from

    def kept_from(self, run: str, chain: str) -> int:
        """First draw position whose log-likelihoods can be read (0 unless ``drop_before`` ran)."""
        st = self._state(run, chain)
        return 0 if st is None else st.kept_from

    def close(self, flush: bool = True) -> None:
        """Flush (by default) and forget the in-memory state."""
        if flush:
            self.flush()
        self._chains.clear()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close(flush=exc[0] is None)

    # ------------------------------------------------------------------ reading

    def length(self, run: str, chain: str) -> int:
        """Draws in the chain: durable plus pending (0 for an unknown chain)."""
        st = self._state(run, chain)
        return 0 if st is None else st.total

    def durable_length(self, run: str, chain: str) -> int:
        """Draws of the chain stored in zarr (what survives a crash right now)."""
        st = self._state(run, chain)
        return 0 if st is None else st.durable

    def _require(self, run: str, chain: str) -> _Chain:
        st = self._state(run, chain)
        if st is None:
            raise KeyError(f"run {run!r}, chain {chain!r}: not in the draw store at {self.path}")
        return st

    @staticmethod
    def _read(arr: zarr.Array, buf, st: _Chain, cols, draws=slice(None)) -> np.ndarray:
        """Rows ``draws`` (a slice with step 1) of durable + pending draws, columns ``cols``."""
        a, b, step = draws.indices(st.total)
        if step != 1:
            raise ValueError(f"draw slices must have step 1, got {draws}")
        b = max(a, b)
        parts = []
        if a < st.base:  # the whole chunks are in zarr
            parts.append(np.asarray(arr[a:min(b, st.base), cols]))
        if b > st.base and st.buffered:  # the current chunk is in memory
            parts.append(np.array(buf[max(a, st.base) - st.base:b - st.base][:, cols]))
        if not parts:
            return np.empty((0, arr.shape[1]))[:, cols]
        return parts[0] if len(parts) == 1 else np.concatenate(parts)

    def read_loglik(self, run: str, chain: str | None = None, obs=slice(None),
                    draws=slice(None)) -> np.ndarray:
        """Log-likelihood draws (draws, k) of one chain, columns ``obs`` (slice or index list).

        ``draws`` selects a range of draws (a slice with step 1; default all).  ``chain=None``
        concatenates every chain in sorted chain order (``draws`` applies to each chain).
        Pending draws are included.
        """
        if chain is None:
            blocks = [self.read_loglik(run, c, obs, draws) for c in self.chains(run)]
            if not blocks:
                raise KeyError(f"run {run!r}: not in the draw store at {self.path}")
            return np.concatenate(blocks)
        st = self._require(run, chain)
        first, last, _ = draws.indices(st.total)
        if first < st.kept_from and last > first:
            raise ValueError(f"run {run!r}, chain {chain!r}: log-likelihood draws {first}:{last} were asked "
                             f"for, but those below position {st.kept_from} were dropped from the draw "
                             f"store at {self.path}")
        cols = obs if isinstance(obs, slice) else np.asarray(obs, dtype=np.intp)
        if not isinstance(obs, slice):
            n = st.loglik.shape[1]
            bad = cols[(cols < 0) | (cols >= n)]
            if bad.size:
                raise IndexError(f"run {run!r}: observation index {int(bad[0])} outside 0..{n - 1}")
        return self._read(st.loglik, st.buf_ll, st, cols, draws)

    def read_all_loglik(self, run: str, start: int, stop: int, first: dict | None = None) -> np.ndarray:
        """Every draw so far of observations ``start:stop``: (total_draws, stop - start).

        Chains are concatenated in sorted chain order; pending draws are included.  This is the
        reader the streaming scorer uses to rebuild its tail buffers.  ``first``: ``{chain: k}``,
        each named chain read from its draw ``k`` on (its first ``k`` draws, warm-up, left out).
        """
        n = self.n_obs(run)
        if n is None:
            raise KeyError(f"run {run!r}: not in the draw store at {self.path}")
        if not (0 <= start <= stop <= n):
            raise IndexError(f"run {run!r}: observation block {start}:{stop} outside 0:{n}")
        first = first or {}
        blocks = [self.read_loglik(run, c, slice(start, stop), draws=slice(int(first.get(c, 0)), None))
                  for c in self.chains(run)]
        if not blocks:
            return np.empty((0, stop - start))
        return np.concatenate(blocks)

    def frozen_view(self, run: str, chains, stop: int, first: dict | None = None) -> "FrozenView":
        """A view of ``stop`` draws of each of ``chains``, from position ``first[chain]`` (default 0:
        e.g. past a chain's warm-up), that another thread may read while this store goes on appending
        (for passes off the service loop).

        Call it from the thread that appends.  Rows of whole chunks already in zarr are never
        rewritten (appends write each whole chunk once; a flush rewrites only the current, partial
        chunk), so the view reads them later through its own read-only array handles; rows of the
        current chunk are copied now.  ``first + stop`` must not exceed any chain's length.
        """
        stop = int(stop)
        parts = {}
        for chain in chains:
            st = self._require(run, chain)
            lo = int((first or {}).get(chain, 0))
            hi = lo + stop
            if hi > st.total or lo < 0:
                raise ValueError(f"run {run!r}, chain {chain!r}: a view of draws {lo}..{hi}, the chain has "
                                 f"{st.total}")
            if stop > 0 and st.kept_from > lo:
                raise ValueError(f"run {run!r}, chain {chain!r}: draws below {st.kept_from} were dropped")
            z_hi = min(hi, st.base)
            handle = zarr.open_array(store=LocalStore(str(self.path), read_only=True),
                                     path=st.loglik.path, mode="r") if z_hi > lo else None
            tail = (np.array(st.buf_ll[max(lo, st.base) - st.base:hi - st.base]) if hi > st.base
                    else np.empty((0, st.loglik.shape[1])))
            parts[chain] = (handle, lo, max(lo, z_hi), tail)
        return FrozenView(run, stop, parts)

    def read_params(self, run: str, chain: str, draws=slice(None)) -> np.ndarray:
        """Parameter draws (draws, p) of one chain (range ``draws``), pending draws included."""
        st = self._require(run, chain)
        return self._read(st.params, st.buf_pa, st, slice(None), draws)

    def read_draw_ids(self, run: str, chain: str, draws=slice(None)) -> np.ndarray:
        """The draw numbers (draws,) of one chain (range ``draws``), pending draws included."""
        st = self._require(run, chain)
        return self._read(st.ids, st.buf_id, st, slice(None), draws)[:, 0]

    def read_run(self, run: str, ragged: bool = False):
        """All log-likelihood draws of a run.

        Returns (chains, draws, n) with every chain cut to the shortest chain's length, or with
        ``ragged=True`` a list of (draws_c, n) arrays in sorted chain order.
        """
        names = self.chains(run)
        if not names:
            raise KeyError(f"run {run!r}: not in the draw store at {self.path}")
        arrays = [self.read_loglik(run, c) for c in names]
        if ragged:
            return arrays
        m = min(a.shape[0] for a in arrays)
        return np.stack([a[:m] for a in arrays])


class FrozenView:
    """``stop`` draws of some chains of one run, readable from any thread (``DrawStore.frozen_view``)."""

    def __init__(self, run: str, stop: int, parts: dict):
        self.run, self.stop, self._parts = run, stop, parts

    def read(self, chain: str, obs=slice(None)) -> np.ndarray:
        """Log-likelihoods (stop, k) of one chain, columns ``obs`` (a slice)."""
        handle, lo, z_hi, tail = self._parts[chain]
        pieces = []
        if z_hi > lo:
            pieces.append(np.asarray(handle[lo:z_hi, obs]))
        if tail.shape[0]:
            pieces.append(tail[:, obs])
        if not pieces:
            return tail[:, obs]
        return pieces[0] if len(pieces) == 1 else np.concatenate(pieces)
