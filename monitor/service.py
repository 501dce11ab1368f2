"""The service loop: run folders in, draw store and history out.

One `Service` owns a watched root and a state folder.  Per run it keeps the readers' positions, a
`StreamingScorer` and the verdict trail; per cycle it

1. reads what is new in each changed run folder (CSV by byte offset, NPZ chunks by name),
2. appends the draws to the zarr store and feeds them to the scorer,
3. flushes the store and only then commits the manifest rows in SQLite (the commit log), and
4. at the snapshot cadence scores each run that grew, evaluates the verdict, writes a snapshot row,
   compares runs that share a data set, and drops ``ENOUGH.json`` when every target is met.

Exactly once: on start every chain in the store is cut back to its committed length, the scorer is
rebuilt from the store, and the readers resume from the committed offsets, so a kill at any instant
loses nothing and counts nothing twice.

Bad input never stops the loop: each problem becomes an event naming the file, and the rest of the
run goes on.
"""
from __future__ import annotations

import fcntl
import math
import os
import queue
import shlex
import subprocess
import threading
import time
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from chainvigil import verdict as verdicts
from chainvigil.estimators import StreamingScorer
from chainvigil.estimators.compare import compare_runs
from chainvigil.estimators.loo import joint_mcse_finish, joint_mcse_parts
from chainvigil.estimators.mixing import finite_relative_efficiency, mixing_summary
from chainvigil.problems import InputProblem
from chainvigil.readers import CsvChainReader, load_npz_chunk, pending_chunks, read_run_info, scan_root
from chainvigil.storage.draws import DrawStore
from chainvigil.storage.history import History

STATE_DIR_NAME = ".chainvigil"
HISTORY_FILE = "history.sqlite"
STORE_DIR = "draws.zarr"
LOCK_FILE = "service.lock"

# r_eff is refreshed from the store when draws per chain have grown by this fraction since the
# last refresh (and whenever a run goes quiet), so the snapshot uses an r_eff close to current.
R_EFF_REFRESH_GROWTH = 0.25
# Observations per block when rereading the store (r_eff refresh): bounds memory for large n.
OBS_BLOCK = 2048
# Quiet time after a file-system event before the loop wakes: samplers write whole chunks or lines,
# so a short pause is enough to gather the chains' writes of one moment into one pass.
WATCH_QUIET_SECONDS = 0.1
# A full rescan of the root every so often catches anything the file-system events missed.
RESCAN_SECONDS = 5.0


class ServiceError(RuntimeError):
    """A problem that stops the service from starting (another instance, an unwritable state)."""


@dataclass
class ChainFeed:
    """Where the service is in one chain's input."""

    name: str
    kind: str  # "csv" or "npz"
    path: Path
    reader: CsvChainReader | None = None
    taken: set = field(default_factory=set)
    param_names: list | None = None


@dataclass
class RunWatch:
    """Everything the service keeps in memory about one run."""

    name: str
    folder: Path
    n: int | None = None
    info: dict = field(default_factory=dict)
    info_stamp: tuple | None = None
    chains: dict = field(default_factory=dict)
    scorer: StreamingScorer | None = None
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


def default_state_dir(root: Path) -> Path:
    return Path(root) / STATE_DIR_NAME


class Service:
    """The chainvigil service for one watched root.

    Parameters
    ----------
    root : folder holding one folder per run.
    state_dir : where the history and the draw store live (default ``ROOT/.chainvigil``).
    every : seconds between snapshots of a run that has new draws.
    targets : overrides of the verdict targets (from command-line flags).
    on_enough : shell command run once per run when its verdict first says enough; ``{run}`` and
        ``{folder}`` are replaced by the run's name and folder.
    report : called with one line of text per snapshot (the headless output).
    """

    def __init__(self, root, state_dir=None, *, every: float = 5.0, poll: bool = False,
                 targets: dict | None = None, on_enough: str | None = None,
                 report: Callable[[str], None] | None = None, signal_enough: bool = True):
        self.root = Path(root).resolve()
        if not self.root.is_dir():
            raise ServiceError(f"{root}: not a folder to watch")
        self.state_dir = Path(state_dir).resolve() if state_dir else default_state_dir(self.root)
        self.every = float(every)
        self.poll = poll
        self.target_overrides = dict(targets or {})
        self.on_enough = on_enough
        self.report = report or (lambda line: None)
        self.signal_enough = signal_enough
        self.runs: dict[str, RunWatch] = {}
        self._stop = threading.Event()
        self._changed: queue.Queue = queue.Queue()
        self._event_seen: set = set()
        self._uncommitted: list = []
        self._lock_handle = None
        try:
            self.state_dir.mkdir(parents=True, exist_ok=True)
        except OSError as err:
            raise ServiceError(f"{self.state_dir}: cannot create the state folder ({err})") from err
        self._take_lock()
        self.history = History(self.state_dir / HISTORY_FILE)
        self.store = DrawStore(self.state_dir / STORE_DIR)
        self._recover()

    # ------------------------------------------------------------------ start-up and recovery
    def _take_lock(self):
        path = self.state_dir / LOCK_FILE
        handle = open(path, "a+")
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            handle.close()
            raise ServiceError(f"{self.state_dir}: another chainvigil service is using this state folder")
        handle.seek(0)
        handle.truncate()
        handle.write(str(os.getpid()))
        handle.flush()
        self._lock_handle = handle

    def _recover(self):
        """Cut every chain back to its committed length and rebuild the scorers from the store."""
        for run_row in self.history.runs():
            name = run_row["name"]
            watch = RunWatch(name=name, folder=Path(run_row.get("folder") or self.root / name))
            watch.n = run_row.get("n_obs")
            self.runs[name] = watch
            for chain_row in self.history.chains(name):
                chain = chain_row["chain"]
                committed = self.history.committed(name, chain)
                self.store.truncate(name, chain, committed["draws"])
                feed = self._make_feed(watch, chain, chain_row["kind"])
                feed.param_names = chain_row.get("param_names") or []
                if feed.kind == "csv":
                    offset = committed["offsets"].get(feed.path.name, 0) if committed["offsets"] else 0
                    feed.reader = CsvChainReader(feed.path, offset=offset, header=chain_row.get("header"))
                else:
                    feed.taken = set(committed["chunks"])
                watch.chains[chain] = feed
            if watch.n:
                self._rebuild_scorer(watch)
            last = self.history.latest_snapshot(name)
            if last:
                watch.draws_at_snapshot = last["draws"]
                watch.signalled = bool(run_row.get("enough_at"))
                watch.trail = [_trail_point(s) for s in self.history.snapshots(run=name)]

    def _make_feed(self, watch: RunWatch, chain: str, kind: str) -> ChainFeed:
        path = watch.folder / (f"{chain}.csv" if kind == "csv" else chain)
        return ChainFeed(name=chain, kind=kind, path=path)

    def _new_scorer(self, watch: RunWatch) -> StreamingScorer:
        name = watch.name
        return StreamingScorer(
            watch.n,
            n_params=watch.info.get("n_params") or self._param_count(watch),
            point_loglik=watch.info.get("point_loglik"),
            reader=lambda start, stop: self.store.read_all_loglik(name, start, stop),
        )

    def _rebuild_scorer(self, watch: RunWatch):
        watch.scorer = self._new_scorer(watch)
        for chain in sorted(self.store.chains(watch.name)):
            total = self.store.length(watch.name, chain)
            for start in range(0, total, 1024):
                block = self.store.read_loglik(watch.name, chain, draws=slice(start, min(total, start + 1024)))
                watch.scorer.add(chain, block)

    def _param_count(self, watch: RunWatch) -> int | None:
        names = [f.param_names for f in watch.chains.values() if f.param_names]
        return len(names[0]) if names else None

    # ------------------------------------------------------------------ events
    def event(self, level: str, kind: str, message: str, run: str | None = None, file=None, once=True):
        """Record an event in the history; repeated identical problems are recorded once."""
        key = (run, str(file) if file else None, kind, message)
        if once and key in self._event_seen:
            return
        self._event_seen.add(key)
        self.history.add_event(level, kind, message, run=run, file=str(file) if file else None)
        if level in ("warning", "error"):
            self.report(f"{_clock()} ! {run or '-'}: {message}")

    def _problem(self, problem: InputProblem, run: str | None, level="warning"):
        self.event(level, problem.kind, str(problem), run=run, file=problem.path)

    # ------------------------------------------------------------------ ingest
    def scan(self, only: set | None = None):
        """Look at the root (or only the named runs) and ingest whatever is new."""
        try:
            folders = scan_root(self.root, ignore=(self.state_dir,), only=only)
        except OSError as err:
            self.event("error", "root_unreadable", f"{self.root}: cannot list the root ({err})")
            return
        for problem in folders.problems:
            run = _run_of(problem.path, self.root)
            if only is None or run in only:
                self._problem(problem, run)
        for name, watch in self.runs.items():
            if name not in folders and not watch.vanished and (only is None or name in only):
                watch.vanished = True
                self.event("warning", "run_vanished",
                           f"{watch.folder}: the run folder disappeared; its draws so far are kept", run=name,
                           file=watch.folder)
        for name, folder in sorted(folders.items()):
            if only is not None and name not in only:
                continue
            try:
                self._ingest_run(name, folder)
            except InputProblem as problem:
                self._problem(problem, name)

    def _ingest_run(self, name: str, folder):
        watch = self.runs.get(name)
        if watch is None:
            watch = RunWatch(name=name, folder=Path(folder.path))
            self.runs[name] = watch
            self.history.upsert_run(name, folder=str(folder.path), state="collecting", first_seen=time.time())
            self.event("info", "run_appeared", f"{folder.path}: new run '{name}'", run=name)
        if watch.vanished:
            watch.vanished = False
            self.event("info", "run_returned", f"{folder.path}: the run folder is back", run=name, once=False)
        self._read_info(watch, folder.run_info)
        for chain, path in sorted(folder.csv_chains.items()):
            self._ingest_chain(watch, chain, "csv", Path(path))
        for chain, path in sorted(folder.npz_chains.items()):
            self._ingest_chain(watch, chain, "npz", Path(path))

    def _read_info(self, watch: RunWatch, path):
        if not path:
            return
        try:
            stat = os.stat(path)
        except OSError:
            return
        stamp = (stat.st_mtime_ns, stat.st_size)
        if stamp == watch.info_stamp:
            return
        try:
            info = read_run_info(path)
        except InputProblem as problem:
            self._problem(problem, watch.name)
            return
        watch.info_stamp = stamp
        watch.info = info
        labels = info.get("observation_labels")
        if labels and watch.n is not None and len(labels) != watch.n:
            self.event("warning", "n_mismatch",
                       f"{path}: run.json names {len(labels)} observations but the draws have {watch.n}; "
                       "labels ignored", run=watch.name, file=path)
        fields = {k: info.get(k) for k in ("title", "dataset", "n_params", "point_loglik")}
        fields["labels"] = labels
        fields["targets"] = info.get("targets") or {}
        self.history.upsert_run(watch.name, **fields)
        if watch.scorer is not None:  # run.json may arrive after the first draws
            watch.scorer.n_params = info.get("n_params") or self._param_count(watch)
            watch.scorer.point_loglik = info.get("point_loglik")

    def _ingest_chain(self, watch: RunWatch, chain: str, kind: str, path: Path):
        feed = watch.chains.get(chain)
        if feed is None:
            feed = ChainFeed(name=chain, kind=kind, path=path)
            if kind == "csv":
                feed.reader = CsvChainReader(path)
            watch.chains[chain] = feed
        elif feed.kind != kind:
            self.event("warning", "not_ours",
                       f"{path}: chain '{chain}' is already read from a {feed.kind} source; ignored",
                       run=watch.name, file=path)
            return
        if kind == "csv":
            self._ingest_csv(watch, feed)
        else:
            self._ingest_npz(watch, feed)

    def _accept(self, watch: RunWatch, feed: ChainFeed, batch, source_file) -> bool:
        """Check a batch against its run; append it to the store and the scorer. False if refused."""
        n = batch.loglik.shape[1]
        if watch.n is None:
            labels = watch.info.get("observation_labels")
            if labels and len(labels) != n:
                self.event("warning", "n_mismatch",
                           f"run.json names {len(labels)} observations but {source_file} has {n}; labels ignored",
                           run=watch.name, file=source_file)
            watch.n = n
            self.history.upsert_run(watch.name, n_obs=n)
        if n != watch.n:
            raise InputProblem(source_file, f"has {n} observations but run '{watch.name}' has {watch.n}",
                               "n_mismatch")
        names = list(batch.param_names or [])
        if feed.param_names is None:
            feed.param_names = names
            header = feed.reader.header.line if feed.reader is not None and feed.reader.header else None
            self.history.upsert_chain(watch.name, feed.name, kind=feed.kind, param_names=names, header=header)
        elif names != feed.param_names:
            raise InputProblem(source_file, f"parameter columns changed from {feed.param_names} to {names}",
                               "header_changed")
        if watch.scorer is None:
            watch.scorer = self._new_scorer(watch)
        if batch.loglik.shape[0] == 0:
            return True
        self.store.append(watch.name, feed.name, batch.loglik, batch.params, draw_ids=batch.draw_ids)
        watch.scorer.add(feed.name, batch.loglik)
        watch.last_growth = time.time()
        return True

    def _commit(self, watch: RunWatch, feed: ChainFeed, entries: list):
        """Queue a chain's new sources for the commit at the end of the pass (`_commit_pending`)."""
        if entries:
            self._uncommitted.append((watch, feed, entries))

    def _commit_pending(self):
        """Make the pass's new draws durable, then record them in the manifest (the commit log).

        Each entry is (source, draws added, CSV offset, NPZ chunk) in reading order. One flush per
        chain per pass, after the snapshots: a flush rewrites the partial last chunk, and new draws
        reach the history without waiting for it. A kill before the commit only means those sources
        are read again on restart (the store is cut back to the committed length).
        """
        while self._uncommitted:
            watch, feed, entries = self._uncommitted.pop(0)
            self._commit_chain(watch, feed, entries)

    def _commit_chain(self, watch: RunWatch, feed: ChainFeed, entries: list):
        self.store.flush(watch.name, feed.name)
        after = self.store.length(watch.name, feed.name) - sum(e[1] for e in entries)
        for source, added, offset, chunk in entries:
            after += added
            self.history.commit_ingest(watch.name, feed.name, source, draws_added=added, draws_after=after,
                                       offset=offset, chunk=chunk)

    def _ingest_csv(self, watch: RunWatch, feed: ChainFeed):
        added, offset = 0, None
        try:
            while True:
                try:
                    batch = feed.reader.read_new()
                except InputProblem as problem:
                    self._problem(problem, watch.name)
                    return
                except OSError as err:
                    self.event("warning", "unreadable", f"{feed.path}: cannot read ({err})", run=watch.name,
                               file=feed.path)
                    return
                for problem in batch.problems:
                    self._problem(problem, watch.name)
                if batch.end_offset == batch.start_offset:
                    return
                if batch.loglik.shape[0] > 0:
                    try:
                        self._accept(watch, feed, batch, feed.path)
                    except InputProblem as problem:
                        # Refused draws stay in the file: rewind so they are read again once fixed.
                        feed.reader.offset = batch.start_offset
                        self._problem(problem, watch.name)
                        return
                    added += batch.loglik.shape[0]
                offset = batch.end_offset
                if not batch.more:
                    return
        finally:
            if offset is not None:
                self._commit(watch, feed, [(feed.path.name, added, offset, None)])

    def _ingest_npz(self, watch: RunWatch, feed: ChainFeed):
        try:
            names = pending_chunks(feed.path, feed.taken)
        except OSError:
            return
        entries = []
        try:
            for chunk in names:
                path = feed.path / chunk
                try:
                    batch = load_npz_chunk(path, n_expected=watch.n, param_names_expected=feed.param_names)
                    self._accept(watch, feed, batch, path)
                    for problem in batch.problems:
                        self._problem(problem, watch.name)
                    added = batch.loglik.shape[0]
                except InputProblem as problem:
                    self._problem(problem, watch.name)
                    if problem.kind in ("n_mismatch", "header_changed"):
                        # Chunks are taken in name order: a refused chunk holds the rest back.
                        return
                    added = 0  # unreadable chunk: recorded as taken with no draws; the event says why
                except OSError as err:
                    self.event("warning", "unreadable", f"{path}: cannot read ({err})", run=watch.name,
                               file=path)
                    return
                feed.taken.add(chunk)
                entries.append((f"{feed.name}/{chunk}", added, None, chunk))
        finally:
            self._commit(watch, feed, entries)

    # ------------------------------------------------------------------ scoring
    def snapshot_due(self, watch: RunWatch, now: float) -> bool:
        if watch.scorer is None or watch.scorer.draws == 0:
            return False
        return watch.scorer.draws != watch.draws_at_snapshot and now - watch.last_snapshot >= self.every

    def _stale(self, watch: RunWatch) -> bool:
        """New draws since the last snapshot, or a snapshot whose r_eff predates the current draws."""
        if watch.scorer is None or watch.scorer.draws == 0:
            return False
        if watch.scorer.draws != watch.draws_at_snapshot:
            return True
        lengths = self._chain_lengths(watch)
        return bool(lengths) and min(lengths.values()) != watch.snapshot_r_eff_per_chain

    @staticmethod
    def _apply_joint_mcse(watch: RunWatch, scores, per_chain: int):
        """loo.mcse as the joint MCSE (docs/numerics.md): exact when the last store pass saw these
        draws, else the joint/independent ratio of that pass applied to the streaming value."""
        independent = scores.loo.get("mcse_independent")
        if watch.joint_mcse is None or independent is None or not math.isfinite(independent):
            return
        if watch.joint_ratio is None:
            # first snapshot since the pass; both MCSEs fall as 1/sqrt(draws)
            scaled = watch.joint_mcse * math.sqrt(watch.r_eff_per_chain / per_chain) if per_chain else math.nan
            if independent > 0 and math.isfinite(scaled):
                watch.joint_ratio = scaled / independent
        if watch.r_eff_per_chain == per_chain:
            scores.use_joint_mcse(watch.joint_mcse)
        elif watch.joint_ratio is not None:
            scores.use_joint_mcse(ratio=watch.joint_ratio)

    def _chain_lengths(self, watch: RunWatch) -> dict:
        return {c: self.store.length(watch.name, c) for c in sorted(self.store.chains(watch.name))}

    def _refresh_r_eff(self, watch: RunWatch, per_chain: int, force: bool):
        grown = per_chain >= (1 + R_EFF_REFRESH_GROWTH) * max(watch.r_eff_per_chain, 1)
        if watch.r_eff is not None and not grown and not (force and per_chain != watch.r_eff_per_chain):
            return
        lengths = self._chain_lengths(watch)
        chains = [c for c, length in lengths.items() if length >= per_chain and per_chain > 0]
        if len(chains) == 0 or per_chain < 4:
            return
        r_eff = np.empty(watch.n)
        parts = np.zeros((len(chains), per_chain))
        for start in range(0, watch.n, OBS_BLOCK):
            stop = min(watch.n, start + OBS_BLOCK)
            block = np.stack([
                self.store.read_loglik(watch.name, c, draws=slice(0, per_chain), obs=slice(start, stop))
                for c in chains
            ])
            r_eff[start:stop] = finite_relative_efficiency(block)
            parts += joint_mcse_parts(block, r_eff[start:stop])  # the joint MCSE needs every draw
        watch.r_eff = r_eff
        watch.r_eff_per_chain = per_chain
        watch.joint_mcse = joint_mcse_finish(parts)
        watch.joint_ratio = None  # measured against the streaming MCSE at the next snapshot

    def _mixing(self, watch: RunWatch, per_chain: int):
        names = next((f.param_names for f in watch.chains.values() if f.param_names), None)
        if not names or per_chain < 4:
            return None
        draws = np.stack([self.store.read_params(watch.name, c)[:per_chain] for c in sorted(self.store.chains(watch.name))
                          if self.store.length(watch.name, c) >= per_chain])
        return mixing_summary(draws, names)

    def take_snapshot(self, watch: RunWatch, *, force_r_eff: bool = False) -> dict | None:
        """Score one run, evaluate the verdict, write the snapshot row; return the snapshot dict."""
        if watch.scorer is None or watch.scorer.draws == 0:
            return None
        now = time.time()
        lengths = self._chain_lengths(watch)
        per_chain = min(lengths.values()) if lengths else 0
        quiet = now - watch.last_growth > max(2 * self.every, 2.0)
        # A refresh rereads the whole store: when the run is growing it is done after the snapshot
        # row is written, for the next one, so new draws reach the history without waiting for it.
        refresh_first = watch.r_eff is None or force_r_eff or quiet
        if refresh_first:
            self._refresh_r_eff(watch, per_chain, force=force_r_eff or quiet)
        rebuilds = watch.scorer.rebuilds
        try:
            scores = watch.scorer.scores(watch.r_eff if watch.r_eff is not None else None)
        except ValueError as err:
            self.event("warning", "not_scored", f"run '{watch.name}' could not be scored yet: {err}", run=watch.name)
            return None
        if watch.scorer.rebuilds > rebuilds:
            self.event("info", "rebuild", f"run '{watch.name}': the PSIS tail buffer grew to {watch.scorer.k} "
                       f"draws per observation (reread from the draw store)", run=watch.name, once=False)
        scores.run = watch.name
        self._apply_joint_mcse(watch, scores, per_chain)
        scores.mixing = self._mixing(watch, per_chain)
        watch.rate_window.append((now, per_chain))
        rate = _rate(watch.rate_window)
        targets = self._targets(watch)
        labels = watch.info.get("observation_labels")
        if labels and len(labels) != watch.n:
            labels = None
        comparison = self._comparison_for(watch)
        verdict = verdicts.evaluate(scores.to_dict(), watch.trail, chains=len(lengths),
                                    activity="paused" if quiet else "growing",
                                    # compared runs that stopped growing: their MCSE part is fixed
                                    finished_runs=[w.name for w in self.runs.values() if w is not watch and (
                                        w.signalled or now - w.last_growth > max(2 * self.every, 2.0))],
                                    draws_per_chain=per_chain, draw_rate=rate, targets=targets,
                                    labels=labels, comparison=comparison)
        scores.verdict = verdict
        data = scores.to_dict()
        row = _snapshot_row(data, now, per_chain, rate, scores.r_eff)
        pointwise = {
            "elpd_loo": np.asarray(data["pointwise"]["loo"], dtype=float),
            "elpd_waic": np.asarray(data["pointwise"]["waic"], dtype=float),
            "k_hat": np.asarray(data["pareto_k"]["values"], dtype=float),
            "labels": labels,
        }
        mixing_rows = [{"param": name, **values} for name, values in (data["mixing"] or {}).get("params", {}).items()]
        snapshot_id = self.history.add_snapshot(watch.name, row, mixing_rows, pointwise,
                                                keep_pointwise=force_r_eff)
        watch.trail.append(_trail_point(row))
        watch.draws_at_snapshot = watch.scorer.draws
        watch.snapshot_r_eff_per_chain = watch.r_eff_per_chain if watch.r_eff is not None else -1
        watch.last_snapshot = now
        state = "settled" if verdict["enough"] else ("attention" if _needs_attention(data, verdict) else "collecting")
        self.history.set_run_state(watch.name, state)
        self.report(_snapshot_line(watch.name, data, per_chain, len(lengths), verdict))
        if verdict["enough"] and not watch.signalled:
            self._signal_enough(watch, verdict, data, now)
        if not refresh_first:
            self._refresh_r_eff(watch, per_chain, force=False)
        return {"id": snapshot_id, **data}

    def _targets(self, watch: RunWatch):
        try:
            return verdicts.Targets.from_sources(None, watch.info.get("targets"), self.target_overrides)
        except ValueError as err:
            self.event("warning", "bad_run_info", f"{watch.folder / 'run.json'}: targets ignored ({err})",
                       run=watch.name, file=watch.folder / "run.json")
            return verdicts.Targets.from_sources(None, None, self.target_overrides)

    def _signal_enough(self, watch: RunWatch, verdict: dict, data: dict, now: float):
        watch.signalled = True
        self.history.set_run_state(watch.name, "settled", enough_at=now)
        path = None
        if self.signal_enough and watch.folder.is_dir():
            try:
                path = verdicts.write_enough_signal(watch.folder, verdict, data["draws"], now)
            except OSError as err:
                self.event("warning", "signal_failed", f"{watch.folder}: cannot write ENOUGH.json ({err})",
                           run=watch.name)
        self.event("info", "enough", f"run '{watch.name}' has enough draws ({data['draws']} in all)"
                   + (f"; wrote {path}" if path else ""), run=watch.name, file=path)
        if self.on_enough:
            command = self.on_enough.replace("{run}", shlex.quote(watch.name)).replace(
                "{folder}", shlex.quote(str(watch.folder)))
            try:
                subprocess.Popen(command, shell=True, cwd=self.state_dir, stdin=subprocess.DEVNULL)
            except OSError as err:
                self.event("warning", "on_enough_failed", f"--on-enough command failed to start: {err}",
                           run=watch.name)

    # ------------------------------------------------------------------ comparison
    def _comparable(self, watch: RunWatch) -> list[RunWatch]:
        dataset = watch.info.get("dataset")
        if not dataset or watch.n is None:
            return []
        return [w for w in self.runs.values()
                if w.info.get("dataset") == dataset and w.n == watch.n and w.draws_at_snapshot > 0]

    def _comparison_for(self, watch: RunWatch):
        dataset = watch.info.get("dataset")
        if not dataset:
            return None
        rows = self.history.comparisons(dataset=dataset)
        return rows or None

    def compare(self):
        """Compare, per data set, every run that has a snapshot; one comparison round per data set."""
        groups: dict = {}
        for watch in self.runs.values():
            dataset = watch.info.get("dataset")
            if dataset and watch.n and watch.draws_at_snapshot > 0:
                groups.setdefault((dataset, watch.n), []).append(watch)
        for (dataset, n), members in sorted(groups.items()):
            if len(members) < 2:
                continue
            pointwise, mcse = {}, {}
            for w in members:
                rows = self.history.pointwise(w.name)
                snap = self.history.latest_snapshot(w.name)
                values = np.array([r["elpd_loo"] if r["elpd_loo"] is not None else np.nan for r in rows])
                if len(values) != n or not np.all(np.isfinite(values)):
                    continue
                pointwise[w.name] = values
                mcse[w.name] = snap["loo_mcse"]
            if len(pointwise) < 2:
                continue
            try:
                rows = compare_runs(pointwise, mcse)
            except ValueError as err:
                self.event("warning", "not_compared", f"data set '{dataset}': {err}")
                continue
            self.history.add_comparison(dataset, rows)

    # ------------------------------------------------------------------ the loop
    def _on_change(self, runs: set):
        self._changed.put(set(runs))

    def stop(self):
        self._stop.set()
        self._changed.put(set())

    def cycle(self, changed: set | None = None, *, force: bool = False):
        """One pass: ingest (all runs, or the changed ones), then snapshot whatever is due."""
        try:
            self.scan(changed)
            now = time.time()
            took = False
            for watch in list(self.runs.values()):
                if force and self._stale(watch):
                    took |= self.take_snapshot(watch, force_r_eff=True) is not None
                elif self.snapshot_due(watch, now):
                    took |= self.take_snapshot(watch) is not None
            if took:
                self.compare()
        finally:
            self._commit_pending()

    def run(self, *, duration: float | None = None):
        """Watch until stopped (``stop()``, SIGINT/SIGTERM in the CLI) or for ``duration`` seconds."""
        from chainvigil.watcher import FolderWatcher

        deadline = time.time() + duration if duration else None
        self.event("info", "service_started", f"watching {self.root} (state in {self.state_dir})", once=False)
        watcher = FolderWatcher(self.root, self._on_change, poll=self.poll, ignore=(self.state_dir,),
                                debounce=WATCH_QUIET_SECONDS)
        watcher.start()
        try:
            self.cycle()
            last_rescan = time.time()
            while not self._stop.is_set():
                wait = min(self.every, 1.0)
                if deadline is not None:
                    wait = max(0.0, min(wait, deadline - time.time()))
                changed: set = set()
                try:
                    changed |= self._changed.get(timeout=wait)
                    while True:
                        changed |= self._changed.get_nowait()
                except queue.Empty:
                    pass
                if self._stop.is_set() or (deadline is not None and time.time() >= deadline):
                    break
                if time.time() - last_rescan >= RESCAN_SECONDS:
                    self.cycle()
                    last_rescan = time.time()
                else:
                    self.cycle(changed)
        finally:
            watcher.stop()
            self.finish()

    def finish(self):
        """Final pass: ingest what is there, snapshot every run that grew, release the state folder."""
        try:
            self.cycle(force=True)
        finally:
            self.event("info", "service_stopped", "service stopped", once=False)
            self.close()

    def close(self):
        if self._lock_handle is not None:
            try:
                fcntl.flock(self._lock_handle, fcntl.LOCK_UN)
                self._lock_handle.close()
            finally:
                self._lock_handle = None


# ---------------------------------------------------------------------- helpers
def _clock() -> str:
    return time.strftime("%H:%M:%S")


def _run_of(path, root: Path) -> str | None:
    try:
        rel = Path(path).resolve().relative_to(root) if Path(path).is_absolute() else Path(path)
    except ValueError:
        rel = Path(os.path.relpath(str(path), str(root)))
    parts = rel.parts
    return parts[0] if parts and parts[0] not in ("..", ".") else None


def _rate(window: deque) -> float | None:
    """Draws per chain per second over the recent window."""
    if len(window) < 2:
        return None
    (t0, d0), (t1, d1) = window[0], window[-1]
    if t1 <= t0 or d1 <= d0:
        return None
    return (d1 - d0) / (t1 - t0)


def _trail_point(row: dict) -> dict:
    """What the verdict's stability and R-hat projections need from an earlier snapshot."""
    point = {key: row.get(key) for key in ("draws_per_chain", "loo_elpd", "loo_mcse", "time", "rhat_max",
                                           "ess_bulk_min", "ess_tail_min")}
    verdict = row.get("verdict")
    point["passed"] = verdict.get("passed") if isinstance(verdict, dict) else None  # the stopping rule's streak
    return point


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _snapshot_row(data: dict, now: float, per_chain: int, rate, r_eff) -> dict:
    loo, waic, dic, aic, k = data["loo"], data["waic"], data["dic"], data["aic"] or {}, data["pareto_k"]
    mixing = data.get("mixing") or {}
    verdict = data.get("verdict") or {}
    r = np.asarray(r_eff if r_eff is not None else 1.0, dtype=float)
    return {
        "time": now, "chains": data["chains"], "draws": data["draws"], "draws_per_chain": per_chain,
        "draw_rate": _num(rate), "r_eff_mean": _num(np.nanmean(r)),
        "loo_elpd": _num(loo["elpd"]), "loo_se": _num(loo["se"]), "loo_mcse": _num(loo["mcse"]),
        "loo_p_eff": _num(loo["p_eff"]), "waic_elpd": _num(waic["elpd"]), "waic_se": _num(waic["se"]),
        "waic_p_eff": _num(waic["p_eff"]), "dic_elpd": _num(dic["elpd"]), "dic_p_eff": _num(dic["p_eff"]),
        "aic_elpd": _num(aic.get("elpd")), "aic_p_eff": _num(aic.get("p_eff")),
        "k_max": _num(k["max"]), "k_threshold": _num(k["threshold"]), "k_above": int(k["above"]),
        "rhat_max": _num(mixing.get("rhat_max")), "ess_bulk_min": _num(mixing.get("ess_bulk_min")),
        "ess_tail_min": _num(mixing.get("ess_tail_min")),
        "enough": int(bool(verdict.get("enough"))), "verdict": verdict,
    }


def _needs_attention(data: dict, verdict: dict) -> bool:
    if "attention" in verdict:  # the verdict holds k-hat advice back until it can be judged
        return bool(verdict["attention"])
    k_max = data["pareto_k"]["max"]
    return bool(verdict.get("refit")) or (k_max is not None and not (k_max <= 0.7))


def _fmt(x, spec=".1f"):
    return "—" if x is None or (isinstance(x, float) and not math.isfinite(x)) else format(x, spec)


def _snapshot_line(run: str, data: dict, per_chain: int, chains: int, verdict: dict) -> str:
    loo, k = data["loo"], data["pareto_k"]
    mixing = data.get("mixing") or {}
    parts = [
        _clock(), run, f"{chains}x{per_chain:,} draws",
        f"elpd_loo {_fmt(loo['elpd'])} ±{_fmt(loo['se'])} (mcse {_fmt(loo['mcse'], '.3f')})",
        f"k̂max {_fmt(k['max'], '.2f')}",
    ]
    if mixing:
        parts.append(f"R̂ {_fmt(mixing.get('rhat_max'), '.3f')}")
    parts.append("→ " + verdicts.describe(verdict))
    return "  ".join(parts)
