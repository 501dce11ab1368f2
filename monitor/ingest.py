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

Recovery (:meth:`Ingest.recover`, :meth:`Ingest.restore_run`): every chain in the store is cut back
to its committed length, the readers resume from the committed offsets and chunk names, and the
scorer is rebuilt from the store.  The same restore is used when a run is set aside after a
failure, so a half-read piece is never counted.

Per-run error boundary: an unexpected exception while ingesting one run becomes an ``error`` event
naming the run and the file being read; the run is set aside (state ``set_aside`` with the reason)
and tried again when its folder changes; every other run goes on.
"""
from __future__ import annotations

import os
import sqlite3
import time
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from chainvigil.events import EventLog
from chainvigil.problems import InputProblem
from chainvigil.readers import CsvChainReader, load_npz_chunk, pending_chunks, read_run_info, scan_root
from chainvigil.rules import RUN_INFO_FILE, run_of_path, run_state

__all__ = ["ChainFeed", "RunState", "Ingest", "MemoryDraws", "read_run_folder", "folder_stamp"]

# Draws per block when rebuilding a scorer from the store.
REBUILD_BLOCK = 1024


@dataclass
class ChainFeed:
    """Where reading stands in one chain's input."""

    name: str
    kind: str  # "csv" or "npz"
    path: Path
    reader: CsvChainReader | None = None
    taken: set = field(default_factory=set)
    param_names: list | None = None


@dataclass
class RunState:
    """Everything the service keeps in memory about one run."""

    name: str
    folder: Path
    n: int | None = None
    info: dict = field(default_factory=dict)
    info_stamp: tuple | None = None
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
    rate_window: deque = field(default_factory=lambda: deque(maxlen=30))
    signalled: bool = False
    vanished: bool = False
    last_growth: float = 0.0
    # Kept after each snapshot, for this pass's comparison (no read-back from the history).
    pointwise_loo: np.ndarray | None = None
    loo_mcse: float | None = None
    last_verdict: dict | None = None
    k_max: float | None = None
    # Set aside after a failure: the reason, and the folder stamp it failed at.
    aside_reason: str | None = None
    aside_stamp: tuple | None = None
    current_file: str | None = None  # the file being read (named by the error boundary)


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
    resume_scorer : called with a ``RunState`` (its chains already cut to the committed lengths) when
        its scorer is rebuilt; returns ``(scorer, {chain: draws it already holds})`` from a
        checkpoint, or None; only the draws after those are streamed from the store.
    """

    def __init__(self, root, store, events: EventLog, *, history=None, ignore=(),
                 make_scorer: Callable | None = None, resume_scorer: Callable | None = None):
        self.root = Path(root)
        self.store = store
        self.events = events
        self.history = history
        self.ignore = tuple(ignore)
        self.make_scorer = make_scorer
        self.resume_scorer = resume_scorer
        self.runs: dict[str, RunState] = {}
        self._uncommitted: list = []

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
        if old is not None:  # keep what the snapshots built up
            for key in ("trail", "rate_window", "signalled", "draws_at_snapshot", "last_snapshot",
                        "pointwise_loo", "loo_mcse", "last_verdict", "k_max"):
                setattr(state, key, getattr(old, key))
        self.runs[name] = state
        for chain_row in self.history.chains(name):
            chain = chain_row["chain"]
            committed = self.history.committed(name, chain)
            self.store.truncate(name, chain, committed["draws"])
            feed = self._make_feed(state, chain, chain_row["kind"])
            feed.param_names = chain_row.get("param_names") or []
            if feed.kind == "csv":
                offset = committed["offsets"].get(feed.path.name, 0)
                feed.reader = CsvChainReader(feed.path, offset=offset, header=chain_row.get("header"))
            else:
                feed.taken = set(committed["chunks"])
            state.chains[chain] = feed
        if state.n:
            self.rebuild_scorer(state)
        return state

    def _make_feed(self, state: RunState, chain: str, kind: str) -> ChainFeed:
        path = state.folder / (f"{chain}.csv" if kind == "csv" else chain)
        return ChainFeed(name=chain, kind=kind, path=path)

    def rebuild_scorer(self, state: RunState):
        if self.make_scorer is None:
            return
        resumed = self.resume_scorer(state) if self.resume_scorer is not None else None
        state.scorer, held = resumed if resumed is not None else (self.make_scorer(state), {})
        for chain in sorted(self.store.chains(state.name)):
            total = self.store.length(state.name, chain)
            for start in range(held.get(chain, 0), total, REBUILD_BLOCK):
                block = self.store.read_loglik(state.name, chain,
                                               draws=slice(start, min(total, start + REBUILD_BLOCK)))
                state.scorer.add(chain, block)

    def param_count(self, state: RunState) -> int | None:
        names = [f.param_names for f in state.chains.values() if f.param_names]
        return len(names[0]) if names else None

    def param_names(self, state: RunState) -> list | None:
        return next((f.param_names for f in state.chains.values() if f.param_names), None)

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
            folders = scan_root(self.root, ignore=self.ignore, only=only)
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
                self.history.upsert_run(name, folder=str(folder.path), state="collecting",
                                        first_seen=time.time())
            self.events.event("info", "run_appeared", f"{folder.path}: new run '{name}'", run=name)
        if state.vanished:
            state.vanished = False
            self.events.event("info", "run_returned", f"{folder.path}: the run folder is back", run=name,
                              once=False)
        self.read_info(state, folder.run_info)
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
        labels = info.get("observation_labels")
        if labels and state.n is not None and len(labels) != state.n:
            self.events.event("warning", "n_mismatch",
                              f"{path}: {RUN_INFO_FILE} names {len(labels)} observations but the draws "
                              f"have {state.n}; labels ignored", run=state.name, file=path)
        if self.history is not None:
            fields = {k: info.get(k) for k in ("title", "dataset", "n_params", "point_loglik")}
            fields["labels"] = labels
            fields["targets"] = info.get("targets") or {}
            self.history.upsert_run(state.name, **fields)
        if state.scorer is not None:  # run.json may arrive after the first draws
            state.scorer.n_params = info.get("n_params") or self.param_count(state)
            state.scorer.point_loglik = info.get("point_loglik")

    def ingest_chain(self, state: RunState, chain: str, kind: str, path: Path):
        feed = state.chains.get(chain)
        if feed is None:
            feed = ChainFeed(name=chain, kind=kind, path=path)
            if kind == "csv":
                feed.reader = CsvChainReader(path)
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

    def _accept(self, state: RunState, feed: ChainFeed, batch, source_file):
        """Check a batch against its run; append it to the store and the scorer (InputProblem if refused)."""
        n = batch.loglik.shape[1]
        if state.n is None:
            labels = state.info.get("observation_labels")
            if labels and len(labels) != n:
                self.events.event("warning", "n_mismatch",
                                  f"{RUN_INFO_FILE} names {len(labels)} observations but {source_file} "
                                  f"has {n}; labels ignored", run=state.name, file=source_file)
            state.n = n
            if self.history is not None:
                self.history.upsert_run(state.name, n_obs=n)
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
        if batch.loglik.shape[0] == 0:
            return
        self.store.append(state.name, feed.name, batch.loglik, batch.params, draw_ids=batch.draw_ids)
        if state.scorer is not None:
            state.scorer.add(feed.name, batch.loglik)
        state.last_growth = time.time()

    def _ingest_csv(self, state: RunState, feed: ChainFeed):
        added, offset = 0, None
        state.current_file = str(feed.path)
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
                        self._accept(state, feed, batch, feed.path)
                    except InputProblem as problem:
                        # Refused draws stay in the file: rewind so they are read again once fixed.
                        feed.reader.offset = batch.start_offset
                        self.events.problem(problem, state.name)
                        return
                    added += batch.loglik.shape[0]
                offset = batch.end_offset
                if not batch.more:
                    return
        finally:
            if offset is not None:
                self._queue_commit(state, feed, [(feed.path.name, added, offset, None)])

    def _ingest_npz(self, state: RunState, feed: ChainFeed):
        try:
            names = pending_chunks(feed.path, feed.taken)
        except OSError:
            return
        entries = []
        try:
            for chunk in names:
                path = feed.path / chunk
                state.current_file = str(path)
                try:
                    batch = load_npz_chunk(path, n_expected=state.n, param_names_expected=feed.param_names)
                    self._accept(state, feed, batch, path)
                    for problem in batch.problems:
                        self.events.problem(problem, state.name)
                    added = batch.loglik.shape[0]
                except InputProblem as problem:
                    self.events.problem(problem, state.name)
                    if problem.kind in ("n_mismatch", "header_changed"):
                        # Chunks are taken in name order: a refused chunk holds the rest back.
                        return
                    added = 0  # unreadable chunk: recorded as taken with no draws; the event says why
                except OSError as err:
                    self.events.event("warning", "unreadable", f"{path}: cannot read ({err})",
                                      run=state.name, file=path)
                    return
                feed.taken.add(chunk)
                entries.append((f"{feed.name}/{chunk}", added, None, chunk))
        finally:
            self._queue_commit(state, feed, entries)

    # ------------------------------------------------------------------ the commit log
    def _queue_commit(self, state: RunState, feed: ChainFeed, entries: list):
        """Queue a chain's new sources for the commit at the end of the pass (`commit_pending`)."""
        if entries:
            self._uncommitted.append((state, feed, entries))

    def commit_pending(self):
        """Make the pass's new draws durable, then record them in the manifest (the commit log).

        Each entry is (source, draws added, CSV offset, NPZ chunk) in reading order. One flush per
        chain per pass, after the snapshots: a flush rewrites the partial last chunk, and new draws
        reach the history without waiting for it. A kill before the commit only means those sources
        are read again on restart (the store is cut back to the committed length).
        """
        while self._uncommitted:
            state, feed, entries = self._uncommitted[0]
            if self.history is not None:
                self.store.flush(state.name, feed.name)
                after = self.store.length(state.name, feed.name) - sum(e[1] for e in entries)
                for source, added, offset, chunk in entries:
                    after += added
                    self.history.commit_ingest(state.name, feed.name, source, draws_added=added,
                                               draws_after=after, offset=offset, chunk=chunk)
            self._uncommitted.pop(0)


def read_run_folder(run_dir) -> tuple[dict, dict, list]:
    """Read every draw of one run folder through the ingest path, into memory (nothing written).

    Returns ``({chain: (loglik (draws, n), params (draws, p), param_names)}, run info, problems)``;
    raises ``InputProblem`` when the folder is not a run folder or holds no readable draws.
    Chains whose observation count differs from the run's are left out (a problem says so).
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
    ingest = Ingest(run_dir.parent, sink, events)
    ingest.ingest_run(run_dir.name, folder)
    state = ingest.runs[run_dir.name]
    chains = {}
    for chain in sink.chains(state.name):
        loglik, params = sink.arrays(state.name, chain)
        if loglik.shape[0]:
            chains[chain] = (loglik, params, list(state.chains[chain].param_names or []))
    if not chains:
        raise InputProblem(run_dir, "holds no readable draws", "not_ours")
    return chains, state.info, events.problems
