"""Ingest: run folders in, draws appended to a draw sink, the commit log written.

One :class:`Ingest` owns the per-run state (:class:`RunState`) and, per chain, where reading stands
(:class:`ChainFeed`: a CSV byte offset, or the set of NPZ chunk names taken).  A pass

1. lists the root (or only the changed runs) with ``chainvigil.readers.scan_root``,
2. reads ``run.json`` when it changed, and what is new in each chain (CSV lines by byte offset,
   NPZ chunks by name order),
3. checks each batch against its run (observations n, parameter columns), appends it to the draw
   sink and feeds it to the run's scorer, and queues a commit entry per source, and
4. at the end of the pass (:meth:`Ingest.commit_pending`) flushes the sink and only then writes
   the manifest rows (the commit log): a kill before the commit only means those sources are read
   again on restart.

The draw sink is the zarr ``DrawStore`` in the service and a :class:`MemoryDraws` for the one-shot
``score`` (:func:`read_run_folder`), so a run folder is read into arrays by this one code path.

Read options (``chainvigil.readers.ReadOptions``: log-likelihood name, warm-up, thinning, parameter
choice): the root defaults given to :class:`Ingest`, overridden by the run's ``run.json``.  They are
fixed when a run's first draws are stored (recorded in the history's ``runs.read_options``); a later
change of ``run.json`` is an ``options_changed`` event and the run keeps the options it started with.
Warm-up draws are stored (the store keeps every row read) but never fed to the scorer; each chain's
warm-up count is kept in :attr:`ChainFeed.warmup` and committed with the chain.

Recovery (:meth:`Ingest.recover`, :meth:`Ingest.restore_run`): every chain in the store is cut back
to its committed length, the readers resume from the committed offsets and chunk names, reader
positions and last draw numbers (with the run's recorded read options), and the scorer is rebuilt
from the run's checkpoint plus the store's post-warm-up draws after it (``resume_scorer``).  When
draws that no usable checkpoint holds were dropped (``watch --keep-draws``, ``prune``), the run is
set aside with a ``scores_lost`` event instead: its draws and commit log stay.  The same restore is used when a run is set aside after a
failure, so a half-read piece is never counted.

Identity of inputs (``chainvigil.identity``): each commit records what the file was (a CSV's inode
and digests of its first and last read bytes; an NPZ chunk's stamp and zip-directory digest).  A
file found to be another one (rewritten, replaced, shrunk, shrunk and regrown; a chunk whose content
changed after it was taken, or a name reused by a restarted sampler) is never read on from the old
position: the draws taken so far stay in their chain, an event names the file and the change, and
the file's content is read from its start as a new segment of the chain, a chain of its own named
``<chain>~2`` (``~3``, ...).  Two sampler runs' draws are never mixed in one chain, and no draw is
counted twice: an unchanged chunk taken into an earlier segment is not taken again.

NPZ chunks are taken in name order, each only after it was read whole: a chunk that fails to read
(written in place and not complete yet, damaged, unreadable for a while) is not taken; the chain
waits at it (later chunks are held back, so draw order is kept) and it is read again once its file
changes (or the chain goes on when it is removed).

Per-run error boundary: an unexpected exception while ingesting one run becomes an ``error`` event
naming the run and the file being read; the run is set aside (state ``set_aside`` with the reason)
and tried again when its folder changes; every other run goes on.
"""
from __future__ import annotations

import dataclasses
import os
import sqlite3
import time
from collections import deque
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from chainvigil.events import EventLog
from chainvigil.identity import chunk_identity, chunk_stamp, csv_change, csv_identity, stamp_of
from chainvigil.problems import InputProblem
from chainvigil.readers import (FULL_LISTING_BATCH, CsvChainReader, ReadOptions, load_npz_chunk,
                                next_chunks, pending_chunks, read_options, read_run_info, scan_root)
from chainvigil.refits import read_refit_info
from chainvigil.rules import RUN_INFO_FILE, run_of_path, run_state

__all__ = ["ChainFeed", "RunState", "Ingest", "MemoryDraws", "read_run_folder", "folder_stamp"]

# Draws per block when rebuilding a scorer from the store.
REBUILD_BLOCK = 1024


@dataclass
class ChainFeed:
    """Where reading stands in one chain's input.

    ``name`` is the chain in the store; ``origin`` the chain name of the input file(s).  They differ
    for a later segment (``<origin>~2``, ...) started when the input was rewritten; an earlier
    segment is ``sealed`` (never read again)."""

    name: str
    kind: str | None  # "csv" or "npz"
    path: Path
    reader: CsvChainReader | None = None
    taken: set = field(default_factory=set)
    param_names: list | None = None
    # Where the chain stands for warm-up, thinning and the draw order (NPZ; a CSV reader keeps its own).
    position: int = 0
    last_draw: int | None = None
    warmup: int = 0  # warm-up draws stored at the start of the chain (left out of scores)
    origin: str = ""
    sealed: bool = False
    identity: dict | None = None  # CSV: the committed identity (``chainvigil.identity.csv_identity``)
    # NPZ, shared by the segments of one origin: chunk name -> (segment, identity) of the content taken.
    known: dict = field(default_factory=dict)
    waiting: dict = field(default_factory=dict)  # NPZ: chunk -> stamp at which it failed to read
    # A new segment compares its first draws with the sealed segment's: (that chain, draws matched).
    same_as: tuple | None = None
    # NPZ: the last chunk taken (name order), the passes since the folder was last listed in full,
    # and the folder's (inode, mtime) then (``Ingest._ingest_npz``: full listings on a schedule).
    last_chunk: str | None = None
    passes_since_listing: int = 0
    listing_stamp: tuple | None = None

    def __post_init__(self):
        self.origin = self.origin or self.name


@dataclass
class RunState:
    """Everything the service keeps in memory about one run."""

    name: str
    folder: Path
    n: int | None = None
    info: dict = field(default_factory=dict)
    info_stamp: tuple | None = None
    options: ReadOptions | None = None  # the read options; fixed once draws are stored
    options_fixed: bool = False
    obs_labels: list | None = None  # "i,j" labels of two-index observations (when run.json has none)
    chains: dict = field(default_factory=dict)
    scorer: object | None = None
    r_eff: np.ndarray | None = None
    r_eff_per_chain: int = 0  # draws per chain the current r_eff was computed from
    joint_mcse: float | None = None  # joint MCSE of elpd_loo at the last store pass ...
    joint_ratio: float | None = None  # ... and its ratio to the streaming (independent) MCSE
    snapshot_r_eff_per_chain: int = -1  # ... and the one the last snapshot used
    draws_at_snapshot: int = -1
    last_snapshot: float = 0.0
    trail: list = field(default_factory=list)
    trail_trimmed: int = 0  # points the trail held after its last trim (chainvigil.service)
    rate_window: deque = field(default_factory=lambda: deque(maxlen=30))
    signalled: bool = False
    vanished: bool = False
    last_growth: float = 0.0
    # Kept after each snapshot, for this pass's comparison (no read-back from the history).
    pointwise_loo: np.ndarray | None = None
    loo_mcse: float | None = None
    last_verdict: dict | None = None
    k_max: float | None = None
    # The mixing figures in force: (draws per chain they cover, (names, chains), figures).
    mixing_cache: tuple | None = None
    # Set aside after a failure: the reason, and the folder stamp it failed at.
    aside_reason: str | None = None
    aside_stamp: tuple | None = None
    current_file: str | None = None  # the file being read (named by the error boundary)
    # A refit run (run.json names ``refit_of``): {"refit_of", "held_out", "fold"}; None otherwise.
    refit: dict | None = None
    # --keep-draws tail/none: what the last snapshot's scores rest on when draws were dropped (None:
    # nothing approximate), and whether the PSIS tail buffer is too small now (the event is sent once).
    retention_note: str | None = None
    buffer_short: bool = False


class MemoryDraws:
    """A draw sink in memory with the ``DrawStore`` methods ingest uses (``append``, ``flush``,
    ``length``, ``chains``, ``truncate``), for reading a run folder without a state folder."""

    def __init__(self):
        self._blocks: dict = {}

    def append(self, run, chain, loglik, params=None, draw_ids=None):
        self._blocks.setdefault((run, chain), []).append(
            (np.asarray(loglik, dtype=float), None if params is None else np.asarray(params, dtype=float)))
        return self.length(run, chain)

    def flush(self, run=None, chain=None):
        pass

    def truncate(self, run, chain, n_draws):
        if self.length(run, chain) != n_draws:
            raise ValueError("MemoryDraws cannot cut back")

    def length(self, run, chain) -> int:
        return sum(b[0].shape[0] for b in self._blocks.get((run, chain), []))

    def chains(self, run) -> list:
        return sorted(c for (r, c) in self._blocks if r == run)

    def arrays(self, run, chain) -> tuple[np.ndarray, np.ndarray]:
        """(loglik (draws, n), params (draws, p)) of one chain."""
        blocks = self._blocks[(run, chain)]
        loglik = np.concatenate([b[0] for b in blocks])
        params = [b[1] if b[1] is not None else np.empty((b[0].shape[0], 0)) for b in blocks]
        return loglik, np.concatenate(params)


def folder_stamp(folder) -> tuple:
    """A cheap fingerprint of a run folder (names, sizes, change times one level down): it changes
    whenever a sampler writes, so a set-aside run is retried on its next change."""
    items = []
    try:
        with os.scandir(folder) as entries:
            for entry in entries:
                try:
                    st = entry.stat(follow_symlinks=False)
                except OSError:
                    continue
                items.append((entry.name, st.st_size, st.st_mtime_ns))
                if entry.is_dir(follow_symlinks=False):
                    try:
                        items.append((entry.name, len(os.listdir(entry.path))))
                    except OSError:
                        pass
    except OSError:
        return ()
    return tuple(sorted(items, key=repr))


class Ingest:
    """Reads run folders below ``root`` into a draw sink and, with a history, the commit log.

    Parameters
    ----------
    root : the watched folder (one folder per run).
    store : the draw sink (``DrawStore`` or ``MemoryDraws``).
    events : an ``EventLog``.
    history : a ``HistoryWriter``; None reads without recording anything (one-shot).
    ignore : folders below the root that are not runs (the state folder).
    make_scorer : called with a ``RunState`` to make its scorer; None feeds no scorer.
    read_defaults : the root's ``ReadOptions`` (command-line flags); ``run.json`` keys override them.
    resume_scorer : called with a ``RunState`` (its chains already cut to the committed lengths) when
        its scorer is rebuilt; returns ``(scorer, {chain: draws it already holds})`` from a
        checkpoint, or None; only the draws after those are streamed from the store.
    """

    def __init__(self, root, store, events: EventLog, *, history=None, ignore=(),
                 make_scorer: Callable | None = None, read_defaults: ReadOptions | None = None,
                 resume_scorer: Callable | None = None):
        self.root = Path(root)
        self.read_defaults = read_defaults if read_defaults is not None else ReadOptions()
        self.store = store
        self.events = events
        self.history = history
        self.ignore = tuple(ignore)
        self.make_scorer = make_scorer
        self.resume_scorer = resume_scorer
        self.runs: dict[str, RunState] = {}
        self._uncommitted: list = []
        self._listing: dict = {}  # scan_root's schedule for checking the contents of chunk folders
        # Asked between pieces (runs, CSV batches, NPZ chunks): True ends the pass early, so a
        # stop request is answered within one piece; what was not read is read on the next pass.
        self.stop_requested: Callable[[], bool] = lambda: False

    # ------------------------------------------------------------------ recovery
    def recover(self):
        """Restore every run the history knows (start-up)."""
        for run_row in self.history.runs():
            self.restore_run(run_row)

    def restore_run(self, run_row: dict) -> RunState:
        """Cut each chain of a run back to its committed length, resume its readers from the commit
        log, rebuild its scorer from the store; returns the new ``RunState``."""
        name = run_row["name"]
        old = self.runs.get(name)
        state = RunState(name=name, folder=Path(run_row.get("folder") or self.root / name))
        state.n = run_row.get("n_obs")
        if old is not None:  # keep what the snapshots built up, and run.json as last read
            for key in ("trail", "rate_window", "signalled", "draws_at_snapshot", "last_snapshot",
                        "pointwise_loo", "loo_mcse", "last_verdict", "k_max", "info", "info_stamp"):
                setattr(state, key, getattr(old, key))
        self.runs[name] = state
        chain_rows = self.history.chains(name)
        state.options = _recorded_options(run_row.get("read_options"))
        if state.options is not None:
            state.options_fixed = True
        elif any((row.get("draws") or 0) > 0 for row in chain_rows):
            # stored before options were recorded: read with the defaults of that time
            state.options, state.options_fixed = ReadOptions(), True
        state.obs_labels = run_row.get("labels")
        sources: dict = {}
        for row in self.history.sources(name):
            sources.setdefault(row["chain"], []).append(row)
        for chain_row in chain_rows:
            chain = chain_row["chain"]
            committed = self.history.committed(name, chain)
            if not self._cut_to_commit_log(name, chain, committed["draws"]):
                continue
            rows = sources.get(chain, [])
            origin = next((r["origin"] for r in rows if r.get("origin")), chain)
            # a chain whose first pieces were all refused may be in an older commit log without a
            # kind or parameter names: it is still the CSV file or chunk folder of that name
            kind = chain_row.get("kind") or ("csv" if (state.folder / f"{origin}.csv").is_file() else "npz")
            feed = self._make_feed(state, chain, kind, origin)
            feed.param_names = chain_row.get("param_names")
            feed.warmup = min(committed.get("warmup") or 0, committed["draws"])
            # rows from before positions were committed: no warm-up or thinning, position = draws
            feed.position = committed["draws"] if committed.get("position") is None else committed["position"]
            feed.last_draw = committed.get("last_draw")
            if feed.kind == "csv":
                offset = committed["offsets"].get(feed.path.name, 0)
                feed.reader = CsvChainReader(feed.path, offset=offset, header=chain_row.get("header"),
                                             options=self.options_of(state), position=feed.position,
                                             last_draw=feed.last_draw)
                feed.identity = next((_identity(r) for r in rows if r["file"] == feed.path.name), None)
            else:
                feed.taken = set(committed["chunks"])
                feed.last_chunk = max(feed.taken) if feed.taken else None
            state.chains[chain] = feed
        self._link_segments(state, sources)
        if state.n:
            self.rebuild_scorer(state)
        return state

    def _cut_to_commit_log(self, run: str, chain: str, draws: int) -> bool:
        """Cut a chain of the store back to its committed length.  When the store holds fewer
        draws than the commit log (a power cut without ``--durable`` lost chunks the manifest had
        already recorded), the chain is dropped and forgotten, to be read again from its files:
        False."""
        try:
            self.store.truncate(run, chain, draws)
            return True
        except (OSError, sqlite3.Error):
            raise  # the state folder itself: the service retries
        except Exception as err:
            self.events.event("error", "store_behind",
                              f"run '{run}', chain '{chain}': the draw store does not hold the {draws} "
                              f"committed draws ({type(err).__name__}: {err}); lost in a power cut "
                              "without --durable? The chain is read again from its files",
                              run=run, once=False)
            self.store.drop(run, chain)
            self.history.reset_chain(run, chain)
            return False

    def _make_feed(self, state: RunState, chain: str, kind: str, origin: str | None = None) -> ChainFeed:
        origin = origin or chain
        path = state.folder / (f"{origin}.csv" if kind == "csv" else origin)
        return ChainFeed(name=chain, kind=kind, path=path, origin=origin)

    @staticmethod
    def _link_segments(state: RunState, sources: dict):
        """After a restore: seal every segment of an input but its last, and give the segments of an
        NPZ input one shared record of the chunk contents taken (later segments win)."""
        by_origin: dict = {}
        for feed in state.chains.values():
            by_origin.setdefault(feed.origin, []).append(feed)
        for origin, feeds in by_origin.items():
            feeds.sort(key=lambda f: _segment_number(f.name, origin))
            known: dict = {}
            for feed in feeds:
                feed.sealed = feed is not feeds[-1]
                feed.known = known
                for row in sources.get(feed.name, []):
                    if feed.kind == "npz" and row.get("digest"):
                        known[row["file"].rsplit("/", 1)[-1]] = (feed.name, _identity(row))

    def options_of(self, state: RunState) -> ReadOptions:
        """The read options of a run: fixed once its draws are stored, else the root defaults
        overridden by its ``run.json``."""
        if state.options is None:
            state.options = read_options(state.info, self.read_defaults)
        return state.options

    def warmup_counts(self, state: RunState) -> dict:
        """``{chain: warm-up draws at the start of the chain in the store}`` (left out of scores)."""
        return {name: feed.warmup for name, feed in state.chains.items()}

    def labels(self, state: RunState) -> list | None:
        """The run's observation labels: ``run.json``'s, else "i,j" for two-index observations."""
        return state.info.get("observation_labels") or state.obs_labels

    def rebuild_scorer(self, state: RunState):
        if self.make_scorer is None:
            return
        resumed = self.resume_scorer(state) if self.resume_scorer is not None else None
        state.scorer, held = resumed if resumed is not None else (self.make_scorer(state), {})
        warmup = self.warmup_counts(state)
        kept_from = getattr(self.store, "kept_from", lambda run, chain: 0)
        starts = {chain: min(warmup.get(chain, 0) + held.get(chain, 0), self.store.length(state.name, chain))
                  for chain in self.store.chains(state.name)}
        lost = {c: kept_from(state.name, c) for c, start in starts.items() if start < kept_from(state.name, c)}
        if lost:
            # --keep-draws tail/none (or prune) dropped draws that no usable checkpoint holds: the
            # scores cannot be rebuilt; the draws and the commit log stay, the run is set aside
            chain, kept = sorted(lost.items())[0]
            reason = (f"the scores cannot be rebuilt: chain '{chain}' keeps log-likelihood draws from "
                      f"position {kept} on, and no usable checkpoint holds the draws before it")
            state.scorer = None
            state.aside_reason, state.aside_stamp = reason, folder_stamp(state.folder)
            self.events.event("error", "scores_lost", f"run '{state.name}': {reason}; its draws and "
                              "parameter draws are kept, it is no longer scored", run=state.name, once=False)
            if self.history is not None:
                self.history.set_run_state(state.name, "set_aside", reason=reason)
            return
        for chain in sorted(self.store.chains(state.name)):
            total = self.store.length(state.name, chain)
            # past the warm-up (never scored) and past what a checkpoint already holds
            for start in range(starts[chain], total, REBUILD_BLOCK):
                block = self.store.read_loglik(state.name, chain,
                                               draws=slice(start, min(total, start + REBUILD_BLOCK)))
                state.scorer.add(chain, block)

    def param_count(self, state: RunState) -> int | None:
        names = [f.param_names for f in state.chains.values() if f.param_names]
        return len(names[0]) if names else None

    def param_names(self, state: RunState) -> list | None:
        return next((f.param_names for f in state.chains.values() if f.param_names), None)

    def mixing_chains(self, state: RunState) -> tuple[list | None, list, list]:
        """Which chains R-hat and ESS may pool: ``(names, chains, left_out)``.

        The run's parameters are those of its first chain (by name) that has any; chains with the
        same parameter names are pooled; every other chain with draws (other names, or none, e.g.
        an NPZ chain without ``params``) is left out as ``(chain, its names)``.  Their
        log-likelihoods are scored all the same: mixing needs the same parameters in every chain.
        """
        stored = set(self.store.chains(state.name))
        feeds = sorted((f for f in state.chains.values() if f.name in stored and f.param_names is not None),
                       key=lambda f: f.name)
        names = next((f.param_names for f in feeds if f.param_names), None)
        if names is None:
            return None, [], []
        chains = [f.name for f in feeds if f.param_names == names]
        left_out = [(f.name, f.param_names) for f in feeds if f.param_names != names]
        return names, chains, left_out

    # ------------------------------------------------------------------ set aside
    def set_aside(self, state: RunState, stage: str, err: BaseException):
        """The per-run error boundary: record an error naming the run and the file, restore the run
        to its committed state, and leave it until its folder changes."""
        where = state.current_file or str(state.folder)
        reason = f"{stage} failed on {where}: {type(err).__name__}: {err}"
        state.aside_reason = reason
        state.aside_stamp = folder_stamp(state.folder)
        self.events.event("error", "run_set_aside", f"run '{state.name}' set aside: {reason}; "
                          "it is tried again when its folder changes", run=state.name, file=where,
                          once=False)
        if self.history is not None:
            self.history.set_run_state(state.name, "set_aside", reason=reason)
            # Drop this run's uncommitted pieces and cut the store back to the commit log.
            self._uncommitted = [e for e in self._uncommitted if e[0].name != state.name]
            run_row = self.history.run(state.name)
            if run_row is not None:
                restored = self.restore_run(run_row)
                restored.aside_reason, restored.aside_stamp = reason, state.aside_stamp

    def _retry_if_changed(self, state: RunState) -> bool:
        """False while a set-aside run's folder is unchanged; True (and the run taken back) after."""
        if state.aside_reason is None:
            return True
        if folder_stamp(state.folder) == state.aside_stamp:
            return False
        state.aside_reason = state.aside_stamp = None
        self.events.forget(state.name)
        self.events.event("info", "run_retried", f"run '{state.name}': its folder changed; tried again",
                          run=state.name, once=False)
        if self.history is not None:
            self.history.set_run_state(state.name, run_state(state.last_verdict, state.k_max))
        return True

    # ------------------------------------------------------------------ ingest
    def scan(self, only: set | None = None):
        """Look at the root (or only the named runs) and ingest whatever is new."""
        try:
            folders = scan_root(self.root, ignore=self.ignore, only=only, listing=self._listing)
        except OSError as err:
            self.events.event("error", "root_unreadable", f"{self.root}: cannot list the root ({err})")
            return
        for problem in folders.problems:
            run = run_of_path(problem.path, self.root)
            if only is None or run in only:
                self.events.problem(problem, run)
        for name, state in self.runs.items():
            if name not in folders and not state.vanished and (only is None or name in only):
                state.vanished = True
                self.events.event("warning", "run_vanished",
                                  f"{state.folder}: the run folder disappeared; its draws so far are kept",
                                  run=name, file=state.folder)
        for name, folder in sorted(folders.items()):
            if only is not None and name not in only:
                continue
            if self.stop_requested():
                return
            state = self.runs.get(name)
            if state is not None and not self._retry_if_changed(state):
                continue
            try:
                self.ingest_run(name, folder)
            except InputProblem as problem:
                self.events.problem(problem, name)
            except (OSError, sqlite3.Error):
                raise  # the state folder (store or history), not this run: the service retries the pass
            except Exception as err:  # the per-run error boundary
                state = self.runs.get(name)
                if state is None:
                    self.events.event("error", "run_set_aside", f"run '{name}' could not be read: "
                                      f"{type(err).__name__}: {err}", run=name, file=folder.path)
                else:
                    self.set_aside(state, "reading", err)
            finally:
                if name in self.runs:
                    self.runs[name].current_file = None

    def ingest_run(self, name: str, folder):
        state = self.runs.get(name)
        if state is None:
            state = RunState(name=name, folder=Path(folder.path))
            self.runs[name] = state
            if self.history is not None:
                self.history.upsert_run(name, folder=str(folder.path), state="gathering",
                                        first_seen=time.time())
            self.events.event("info", "run_appeared", f"{folder.path}: new run '{name}'", run=name)
        if state.vanished:
            state.vanished = False
            self.events.event("info", "run_returned", f"{folder.path}: the run folder is back", run=name,
                              once=False)
        self.read_info(state, folder.run_info)
        if not folder.run_info:  # no run.json: the root defaults alone (they may differ after a restart)
            self._update_options(state, None)
        for chain, path in sorted(folder.csv_chains.items()):
            self.ingest_chain(state, chain, "csv", Path(path))
        for chain, path in sorted(folder.npz_chains.items()):
            self.ingest_chain(state, chain, "npz", Path(path))

    def read_info(self, state: RunState, path):
        if not path:
            return
        state.current_file = str(path)
        try:
            stat = os.stat(path)
        except OSError:
            return
        stamp = (stat.st_mtime_ns, stat.st_size)
        if stamp == state.info_stamp:
            return
        try:
            info = read_run_info(path)
        except InputProblem as problem:
            self.events.problem(problem, state.name)
            return
        state.info_stamp = stamp
        state.info = info
        for problem in getattr(info, "problems", ()):  # each field dropped, once per change of run.json
            self.events.problem(problem, state.name, once=False)
        self._update_options(state, path)
        self._read_refit_fields(state, path)
        labels = info.get("observation_labels")
        if labels and state.n is not None and len(labels) != state.n:
            self.events.event("warning", "n_mismatch",
                              f"{path}: {RUN_INFO_FILE} names {len(labels)} observations but the draws "
                              f"have {state.n}; labels ignored", run=state.name, file=path)
        if self.history is not None:
            fields = {k: info.get(k) for k in ("title", "dataset", "n_params", "point_loglik")}
            fields["labels"] = labels or state.obs_labels
            fields["targets"] = info.get("targets") or {}
            self.history.upsert_run(state.name, **fields)
        if state.scorer is not None:  # run.json may arrive after the first draws
            state.scorer.n_params = info.get("n_params") or self.param_count(state)
            state.scorer.point_loglik = info.get("point_loglik")

    def _update_options(self, state: RunState, path):
        """The read options after run.json (re)appeared (``path``), or from the root defaults alone
        (``path`` None): taken while no draws are stored; after that a change is an event and the run
        keeps the options it started with."""
        wanted = read_options(state.info, self.read_defaults)
        if not state.options_fixed:
            if wanted != state.options:
                state.options = wanted
                for feed in state.chains.values():  # nothing stored yet: read again with the new options
                    if feed.kind == "csv" and feed.param_names is None:
                        feed.reader = CsvChainReader(feed.path, options=wanted)
            return
        if wanted != state.options:
            changed = ", ".join(f"{k} {_shown(getattr(state.options, k))} -> {_shown(getattr(wanted, k))}"
                                for k in ("loglik", "warmup", "thin", "params", "ignore")
                                if getattr(wanted, k) != getattr(state.options, k))
            where = path if path is not None else f"run '{state.name}' (no {RUN_INFO_FILE}, command-line defaults)"
            self.events.event("warning", "options_changed",
                              f"{where}: the read options changed after draws were read ({changed}); "
                              "the run keeps the options it started with", run=state.name, file=path,
                              once=path is None)  # run.json: once per change; defaults: once per start

    def _fix_options(self, state: RunState):
        """Fix the run's read options at its first stored draws, and record them."""
        if state.options_fixed:
            return
        state.options_fixed = True
        if self.history is not None:
            self.history.upsert_run(state.name, read_options=_options_record(self.options_of(state)))

    def _read_refit_fields(self, state: RunState, path):
        """Recognise a refit run (run.json with ``refit_of``/``held_out``/``fold``): its draws are read
        like any run's; the service routes it (``chainvigil.refit_service``). A bad refit field is an
        event and the run stays an ordinary one (its draws are still read)."""
        try:
            refit = read_refit_info(Path(path).parent)
        except InputProblem as problem:
            self.events.problem(problem, state.name)
            refit = None
        state.refit = refit
        if self.history is not None:
            self.history.upsert_run(state.name, refit_of=refit["refit_of"] if refit else None,
                                    fold=refit["fold"] if refit else None)

    def ingest_chain(self, state: RunState, chain: str, kind: str, path: Path):
        feed = self.current_feed(state, chain)
        if feed is None:
            segment = state.chains.get(chain)
            if segment is not None and segment.origin != chain:
                # a file named like a segment (``a~2.csv`` beside a rewritten ``a.csv``): reading it
                # into that chain would mix two inputs
                self.events.event("warning", "name_taken",
                                  f"{path}: chain '{chain}' is the name of a later part of chain "
                                  f"'{segment.origin}' (its input was rewritten); this file is not read: "
                                  "give it another name", run=state.name, file=path)
                return
            feed = ChainFeed(name=chain, kind=kind, path=path)
            if kind == "csv":
                feed.reader = CsvChainReader(path, options=self.options_of(state))
            state.chains[chain] = feed
        elif feed.kind != kind:
            self.events.event("warning", "not_ours",
                              f"{path}: chain '{chain}' is already read from a {feed.kind} source; ignored",
                              run=state.name, file=path)
            return
        if kind == "csv":
            self._ingest_csv(state, feed)
        else:
            self._ingest_npz(state, feed)

    @staticmethod
    def current_feed(state: RunState, origin: str) -> ChainFeed | None:
        """The segment of input chain ``origin`` that is read now (None before its first read)."""
        feeds = [f for f in state.chains.values() if f.origin == origin and not f.sealed]
        return max(feeds, key=lambda f: _segment_number(f.name, origin)) if feeds else None

    def new_segment(self, state: RunState, feed: ChainFeed, file, change: str) -> ChainFeed:
        """Seal ``feed`` and start the next segment of its input (read from the start); an event
        names the file and the change.  Returns the new segment's feed."""
        feed.sealed = True
        k = max(1, _segment_number(feed.name, feed.origin)) + 1
        while f"{feed.origin}~{k}" in state.chains:
            k += 1
        name = f"{feed.origin}~{k}"
        new = ChainFeed(name=name, kind=feed.kind, path=feed.path, origin=feed.origin, known=feed.known,
                        same_as=(feed.name, 0))
        if new.kind == "csv":  # a new segment starts afresh: its own warm-up, positions and draw order
            new.reader = CsvChainReader(feed.path, options=self.options_of(state))
        state.chains[name] = new
        kept = self.store.length(state.name, feed.name) if feed.name in self.store.chains(state.name) else 0
        self.events.event("warning", "rewritten",
                          f"{file}: {change}; the {kept} draws taken before stay in chain '{feed.name}' "
                          f"and the new content is read from its start as chain '{name}' (draws of "
                          "two sampler runs are never mixed in one chain; its first draws, as far as "
                          f"they equal those of '{feed.name}', are not counted again)",
                          run=state.name, file=file, once=False)
        return new

    def _accept(self, state: RunState, feed: ChainFeed, batch, source_file):
        """Check a batch against its run; append it to the store and the scorer; returns the draws
        appended (InputProblem if refused)."""
        n = batch.loglik.shape[1]
        if state.n is None:
            labels = state.info.get("observation_labels")
            if labels and len(labels) != n:
                self.events.event("warning", "n_mismatch",
                                  f"{RUN_INFO_FILE} names {len(labels)} observations but {source_file} "
                                  f"has {n}; labels ignored", run=state.name, file=source_file)
            state.n = n
            state.obs_labels = batch.obs_labels
            if self.history is not None:
                fields = {"n_obs": n}
                if not labels and state.obs_labels:
                    fields["labels"] = state.obs_labels
                self.history.upsert_run(state.name, **fields)
        if n != state.n:
            raise InputProblem(source_file, f"has {n} observations but run '{state.name}' has {state.n}",
                               "n_mismatch")
        names = list(batch.param_names or [])
        if feed.param_names is None:
            feed.param_names = names
            header = feed.reader.header.line if feed.reader is not None and feed.reader.header else None
            if self.history is not None:
                self.history.upsert_chain(state.name, feed.name, kind=feed.kind, param_names=names,
                                          header=header)
        elif names != feed.param_names:
            raise InputProblem(source_file, f"parameter columns changed from {feed.param_names} to {names}",
                               "header_changed")
        if state.scorer is None and self.make_scorer is not None:
            state.scorer = self.make_scorer(state)
        batch = self._skip_shared_prefix(state, feed, batch)
        if batch.loglik.shape[0] == 0:
            return 0
        self._fix_options(state)
        self.store.append(state.name, feed.name, batch.loglik, batch.params, draw_ids=batch.draw_ids)
        feed.warmup += batch.warmup_rows
        scored = batch.loglik[batch.warmup_rows:]  # warm-up draws are stored, never scored
        if state.scorer is not None and scored.shape[0]:
            state.scorer.add(feed.name, scored)
        state.last_growth = time.time()
        return batch.loglik.shape[0]

    def _skip_shared_prefix(self, state: RunState, feed: ChainFeed, batch):
        """Leave out a new segment's first draws that equal, one by one, the draws its sealed
        segment holds at the same places: they were taken already (a file cut back to a checkpoint
        and grown again, or rewritten with the same draws), so they are not counted twice.  The
        comparison ends at the first draw that differs or when the sealed segment is passed."""
        if feed.same_as is None or batch.loglik.shape[0] == 0:
            return batch
        old, pos = feed.same_as
        total = self.store.length(state.name, old) if old in self.store.chains(state.name) else 0
        k = min(batch.loglik.shape[0], total - pos)
        matched = 0
        if k > 0:
            pa = self.store.read_params(state.name, old, draws=slice(pos, pos + k))
            same = np.ones(k, dtype=bool)
            kept = getattr(self.store, "kept_from", lambda run, chain: 0)(state.name, old)
            columns = getattr(self.store, "stored_columns", None)  # a subsampled run stores m columns
            if pos + k > kept:  # log-likelihoods dropped by --keep-draws: compare what is kept
                lo = max(pos, kept)
                ll = self.store.read_loglik(state.name, old, draws=slice(lo, pos + k))
                new = batch.loglik[lo - pos:k]
                same[lo - pos:] = _rows_equal(ll, new if columns is None else columns(state.name, new))
            if pa.shape[1] == batch.params.shape[1]:
                same &= _rows_equal(pa, batch.params[:k])
            if pos < kept and pa.shape[1] == 0:
                same[:max(0, min(k, kept - pos))] = False  # nothing left to compare: counted as new
            matched = k if same.all() else int(np.argmin(same))
        feed.same_as = (old, pos + matched) if matched == k and pos + matched < total else None
        if matched == 0:
            return batch
        cut = {"loglik": batch.loglik[matched:], "params": batch.params[matched:],
               "warmup_rows": max(0, batch.warmup_rows - matched)}
        for key in ("draw_ids", "positions"):
            if getattr(batch, key) is not None:
                cut[key] = getattr(batch, key)[matched:]
        return dataclasses.replace(batch, **cut)

    def _csv_segment(self, state: RunState, feed: ChainFeed) -> ChainFeed:
        """The feed to read the CSV with: a new segment when the file is no longer the one whose
        first bytes were committed (``chainvigil.identity.csv_change``)."""
        if feed.identity is None:
            return feed
        try:
            change = csv_change(feed.identity, feed.path)
        except (InputProblem, OSError):
            return feed  # cannot be opened now: the reader says why
        return feed if change is None else self.new_segment(state, feed, feed.path, change)

    @staticmethod
    def _check_not_rewritten_while_read(feed: ChainFeed):
        """Raise when the CSV was rewritten between the check before reading and now: the lines
        just read may belong to either file, so the run is restored from the commit log (the
        per-run error boundary) and the file is looked at afresh."""
        if feed.identity is None:
            return
        try:
            change = csv_change(feed.identity, feed.path)
        except (InputProblem, OSError):
            change = "it can no longer be opened"
        if change is not None:
            raise RuntimeError(f"{feed.path} was rewritten while it was being read ({change}); "
                               "what was read in this pass is dropped")

    def _ingest_csv(self, state: RunState, feed: ChainFeed):
        added, offset, position, last_draw = 0, None, None, None
        state.current_file = str(feed.path)
        feed = self._csv_segment(state, feed)
        try:
            while True:
                try:
                    batch = feed.reader.read_new()
                except InputProblem as problem:
                    self.events.problem(problem, state.name)
                    return
                except OSError as err:
                    self.events.event("warning", "unreadable", f"{feed.path}: cannot read ({err})",
                                      run=state.name, file=feed.path)
                    return
                for problem in batch.problems:
                    self.events.problem(problem, state.name)
                if batch.end_offset == batch.start_offset:
                    return
                if batch.loglik.shape[0] > 0:
                    try:
                        added += self._accept(state, feed, batch, feed.path)
                    except InputProblem as problem:
                        # Refused draws stay in the file: rewind so they are read again once fixed.
                        feed.reader.offset = batch.start_offset
                        self.events.problem(problem, state.name)
                        return
                offset, position, last_draw = batch.end_offset, batch.end_position, batch.last_draw
                feed.position, feed.last_draw = position, last_draw
                if not batch.more or self.stop_requested():
                    return
        finally:
            if offset is not None:
                self._check_not_rewritten_while_read(feed)
                try:
                    identity = csv_identity(feed.path, offset, feed.origin)
                except (InputProblem, OSError, EOFError):
                    identity = None  # gone or cut short meanwhile: the next pass finds out
                self._queue_commit(state, feed, [(feed.path.name, added, offset, None, identity, position,
                                                  last_draw, feed.warmup)])

    def _npz_segment(self, state: RunState, feed: ChainFeed) -> ChainFeed:
        """The feed to take chunks with: a new segment when a chunk this segment took has new
        content (rewritten after it was taken, or its name reused by a restarted sampler)."""
        for chunk in sorted(feed.taken):
            seen = feed.known.get(chunk)
            if seen is None:
                continue
            identity = self._changed_chunk(feed, chunk, seen[1])
            if identity is not None:
                return self.new_segment(state, feed, feed.path / chunk,
                                        "this chunk's content changed after its draws were taken "
                                        "(rewritten, or its name reused by a restarted sampler)")
        return feed

    def _changed_chunk(self, feed: ChainFeed, chunk: str, taken: dict) -> dict | None:
        """The identity of ``chunk`` when its content differs from ``taken``; None when it is the
        same (a changed stamp with the same content is remembered), gone or unreadable."""
        path = feed.path / chunk
        stamp = chunk_stamp(path)
        if stamp is None or stamp == stamp_of(taken):
            return None
        try:
            now = chunk_identity(path, feed.origin)
        except (InputProblem, OSError):
            return None  # being written: looked at again on the next pass
        if now["digest"] == taken.get("digest"):
            taken.update({k: now[k] for k in ("dev", "ino", "size", "mtime_ns")})
            return None
        return now

    def _new_npz_chunks(self, state: RunState, feed: ChainFeed) -> tuple[ChainFeed, list]:
        """The feed to take chunks with and the chunks it has not taken, in name order.

        A chain with fewer than ``FULL_LISTING_BATCH`` taken chunks is listed in full every pass
        (the taken chunks' identities compared, every new name found).  A longer one is listed in
        full every ``taken // FULL_LISTING_BATCH`` passes (so the listing costs the same per pass
        however long the run), and whenever its folder changed in a way the numbered series does not
        explain (no next chunk found, or names that are not numbered); in between, only the next
        names of the series are looked up.  A chunk rewritten after it was taken, or a new name out of
        the series, is therefore found that many passes later at most (docs/architecture.md).
        """
        taken = len(feed.taken)
        full = taken < FULL_LISTING_BATCH or feed.last_chunk is None
        stamp = None
        if not full:
            feed.passes_since_listing += 1
            full = feed.passes_since_listing >= taken // FULL_LISTING_BATCH
        if not full:
            try:
                st = os.stat(feed.path)
                stamp = (st.st_ino, st.st_mtime_ns)
            except OSError:
                return feed, []
            found = next_chunks(feed.path, feed.last_chunk, feed.taken)
            if found is None or (not found and stamp != feed.listing_stamp):
                full = True
            else:
                feed.listing_stamp = stamp
                return feed, found
        try:
            st = os.stat(feed.path)
            stamp = (st.st_ino, st.st_mtime_ns)
        except OSError:
            stamp = None
        feed = self._npz_segment(state, feed)
        feed.passes_since_listing, feed.listing_stamp = 0, stamp
        return feed, pending_chunks(feed.path, feed.taken)

    def _ingest_npz(self, state: RunState, feed: ChainFeed):
        try:
            feed, names = self._new_npz_chunks(state, feed)
        except OSError:
            return
        entries = []
        try:
            for chunk in names:
                if self.stop_requested():
                    return
                path = feed.path / chunk
                state.current_file = str(path)
                seen = feed.known.get(chunk)
                if seen is not None and seen[0] != feed.name:
                    if self._changed_chunk(feed, chunk, seen[1]) is None:
                        continue  # taken unchanged into an earlier segment: never counted twice
                    self.events.event("info", "chunk_reused",
                                      f"{path}: new content under a name taken before into chain "
                                      f"'{seen[0]}'; read as part of chain '{feed.name}'",
                                      run=state.name, file=path)
                entry = self._take_chunk(state, feed, chunk)
                if entry is None:
                    return  # chunks are taken in name order: this one holds the rest back
                entries.append(entry)
        finally:
            self._queue_commit(state, feed, entries)

    def _take_chunk(self, state: RunState, feed: ChainFeed, chunk: str) -> tuple | None:
        """Read one chunk whole and append its draws; its commit entry, or None when it cannot be
        taken yet (an event says why; it is tried again once its file changes).

        A failure to read it is a problem of the input; a failure to write the draws (``OSError``
        from the draw store) is not caught here: it is a storage problem for the service.
        """
        path = feed.path / chunk
        stamp = chunk_stamp(path)
        if stamp is None:
            return None
        if feed.waiting.get(chunk) == stamp:
            return None  # the same bytes that failed before: wait for the file to change
        try:
            batch = load_npz_chunk(path, n_expected=state.n, param_names_expected=feed.param_names,
                                   options=self.options_of(state), position=feed.position,
                                   last_draw=feed.last_draw)
            identity = chunk_identity(path, feed.origin)
        except InputProblem as problem:
            self._wait_for_chunk(state, feed, chunk, stamp, problem)
            return None
        except OSError as err:
            self._wait_for_chunk(state, feed, chunk, stamp,
                                 InputProblem(path, f"cannot read ({err})", "unreadable"))
            return None
        if stamp_of(identity) != stamp:
            return None  # written while it was read: read again on the next pass
        try:
            added = self._accept(state, feed, batch, path)
        except InputProblem as problem:
            self._wait_for_chunk(state, feed, chunk, stamp, problem)
            return None
        feed.position, feed.last_draw = batch.end_position, batch.last_draw
        for problem in batch.problems:
            self.events.problem(problem, state.name)
        feed.taken.add(chunk)
        if feed.last_chunk is None or chunk > feed.last_chunk:
            feed.last_chunk = chunk
        feed.waiting.pop(chunk, None)
        feed.known[chunk] = (feed.name, identity)
        return (f"{feed.origin}/{chunk}", added, None, chunk, identity, feed.position, feed.last_draw,
                feed.warmup)

    def _wait_for_chunk(self, state: RunState, feed: ChainFeed, chunk: str, stamp, problem):
        feed.waiting[chunk] = stamp
        self.events.event("warning", problem.kind,
                          f"{problem}; not taken: chain '{feed.name}' waits at this chunk (later "
                          "chunks are held back) until it reads whole or is removed",
                          run=state.name, file=problem.path)

    # ------------------------------------------------------------------ the commit log
    def _queue_commit(self, state: RunState, feed: ChainFeed, entries: list):
        """Queue a chain's new sources for the commit at the end of the pass (`commit_pending`)."""
        if entries:
            self._uncommitted.append((state, feed, entries))

    def commit_pending(self):
        """Make the pass's new draws durable, then record them in the manifest (the commit log).

        Each entry is (source, draws added, CSV offset, NPZ chunk, identity of the source, reader
        position, last draw number, the chain's warm-up draws) in reading order; the identity goes
        into the same transaction as the manifest row. One flush per
        chain per pass, after the snapshots: a flush rewrites the partial last chunk, and new draws
        reach the history without waiting for it. A kill before the commit only means those sources
        are read again on restart (the store is cut back to the committed length).
        """
        while self._uncommitted:
            state, feed, entries = self._uncommitted[0]
            if self.history is not None:
                self.store.flush(state.name, feed.name)  # with a durable store: fsynced as well
                after = self.store.length(state.name, feed.name) - sum(e[1] for e in entries)
                for source, added, offset, chunk, identity, position, last_draw, warmup in entries:
                    after += added
                    self.history.commit_ingest(state.name, feed.name, source, draws_added=added,
                                               draws_after=after, offset=offset, chunk=chunk,
                                               kind=feed.kind, identity=identity, position=position,
                                               last_draw=last_draw, warmup=warmup)
                    if feed.kind == "csv" and identity is not None:
                        feed.identity = identity
            self._uncommitted.pop(0)


def _options_record(options: ReadOptions) -> dict:
    """Read options as the JSON object kept in ``runs.read_options``."""
    record = asdict(options)
    record["params"] = None if options.params is None else list(options.params)
    record["ignore"] = list(options.ignore)
    return record


def _recorded_options(record) -> ReadOptions | None:
    """The read options recorded for a run (None when none are, or they cannot be used)."""
    if not isinstance(record, dict):
        return None
    try:
        params = record.get("params")
        return ReadOptions(loglik=record.get("loglik", "loglik"), warmup=record.get("warmup", 0),
                           thin=record.get("thin", 1), params=None if params is None else tuple(params),
                           ignore=tuple(record.get("ignore") or ()))
    except (TypeError, ValueError):
        return None


def _shown(value) -> str:
    if isinstance(value, tuple):
        value = list(value)
    return "default" if value is None else repr(value)


def _segment_number(name: str, origin: str) -> int:
    """1 for the first segment of an input (named as the input), k for ``<origin>~k``."""
    if name == origin:
        return 1
    try:
        return int(name[len(origin) + 1:])
    except ValueError:
        return 1


def _rows_equal(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """(draws,) True where two (draws, k) blocks hold the same values (NaN equal to NaN)."""
    return np.all((a == b) | (np.isnan(a) & np.isnan(b)), axis=1)


def _identity(row: dict) -> dict:
    """The identity fields of a ``sources`` row (chainvigil.storage.history)."""
    return {k: row.get(k) for k in ("origin", "dev", "ino", "size", "mtime_ns", "head", "tail", "digest")
            if row.get(k) is not None}


def read_run_folder(run_dir, read_defaults: ReadOptions | None = None,
                    warmup_out: dict | None = None) -> tuple[dict, dict, list]:
    """Read every draw of one run folder through the ingest path, into memory (nothing written).

    Returns ``({chain: (loglik (draws, n), params (draws, p), param_names)}, run info, problems)``
    with each chain's warm-up draws left out; the read options are ``read_defaults`` overridden by
    the folder's ``run.json``, as in the service.  Raises ``InputProblem`` when the folder is not a
    run folder or holds no readable draws after warm-up.  Chains whose observation count differs
    from the run's are left out (a problem says so).  ``warmup_out``, when given, is filled with
    ``{chain: warm-up draws left out}``.
    """
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise InputProblem(run_dir, "is not a folder", "not_ours")
    folder = scan_root(run_dir.parent, only=[run_dir.name]).get(run_dir.name)
    if folder is None or not folder.chains:
        raise InputProblem(run_dir, "holds no chains (no <chain>.csv and no <chain>/*.npz)", "not_ours")
    events = EventLog()
    events.problems.extend(folder.problems)
    sink = MemoryDraws()
    ingest = Ingest(run_dir.parent, sink, events, read_defaults=read_defaults)
    ingest.ingest_run(run_dir.name, folder)
    state = ingest.runs[run_dir.name]
    chains, warmup = {}, 0
    for chain in sink.chains(state.name):
        loglik, params = sink.arrays(state.name, chain)
        skip = state.chains[chain].warmup
        warmup += skip
        if warmup_out is not None:
            warmup_out[chain] = skip
        if loglik.shape[0] > skip:
            chains[chain] = (loglik[skip:], params[skip:], list(state.chains[chain].param_names or []))
    if not chains:
        if warmup:
            raise InputProblem(run_dir, f"holds only warm-up draws so far ({warmup} in all; warm-up is "
                                        f"{ingest.options_of(state).warmup} draws per chain)", "not_ours")
        raise InputProblem(run_dir, "holds no readable draws", "not_ours")
    return chains, state.info, events.problems
