"""The service loop: orchestration only (docs/architecture.md).

One `Service` owns a watched root and a state folder (its lock, the history, the draw store) and
drives the parts that do the work:

* ``chainvigil.ingest``: run folders in, draws appended to the store, the commit log;
* ``chainvigil.scorer_lifecycle`` (``Service.scorers``): each run's scorer made, resumed from its
  checkpoint, checkpointed; the store retention (``--keep-draws``);
* ``chainvigil.joint_passes`` (``Service.passes``): the joint-MCSE store passes off the loop;
* ``chainvigil.mixing_schedule`` (``Service.mixing``): R-hat, ESS, MCSE of the parameters on a schedule;
* ``chainvigil.cadence`` (``Service.cadence``): when a run's snapshot is due, its activity;
* ``chainvigil.comparisons`` (``Service.comparisons``): the runs of each data set compared;
* ``chainvigil.refit_service`` (``Service.refits``): refit requests and exact values;
* ``chainvigil.verdict``: enough draws?;
* ``chainvigil.snapshot``: the snapshot row built from scores + mixing + verdict (pure);
* ``chainvigil.signals``: ENOUGH.json and the ``--on-enough`` command;
* ``chainvigil.reports``: the headless text lines; ``chainvigil.events``: the event log.

One pass (:meth:`Service.cycle`):

1. ingest what is new (all runs, or the changed ones);
2. score every run whose snapshot is due, and keep its pointwise elpd_loo and MCSE in memory;
3. compare the runs of each data set from those in-memory values (this pass's comparison);
4. per scored run: the verdict (using step 3's comparison), the snapshot row, the run state, the
   headless line, and the stop signal and user command when it first has enough;
5. commit: flush the draw store, then write the manifest rows (the commit log).

Commit order.  Snapshot rows (step 4) are written before the pass's manifest commit (step 5): a
flush rewrites the partial last chunk of each chain, which is the slow part of a pass, so new scores
reach the history (and the screen) without waiting for it.  A snapshot may therefore describe draws
that a kill right after it leaves uncommitted; on restart those draws are read again from the same
files and counted once, so the next snapshot agrees again.  The manifest is what exactly-once rests
on; snapshot rows are reports, never used to restore draws.

Exactly once: on start every chain in the store is cut back to its committed length, the scorer is
rebuilt from the store, and the readers resume from the committed offsets, so a kill at any instant
loses nothing and counts nothing twice.

Failures.  Bad input becomes an event naming the file.  Any other exception while ingesting or
scoring one run sets that run aside (``chainvigil.ingest``); every other run goes on.  A failure of
the state folder (history locked past the busy timeout, disk full, read-only or deleted folder) is
reported and the pass retried with back-off (a deleted state folder is created afresh).  A crash of
the loop itself is recorded as ``service_crashed`` with the traceback summary, never as a clean stop.
"""
from __future__ import annotations

import fcntl
import os
import queue
import sqlite3
import threading
import time
import traceback
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from chainvigil import verdict as verdicts
from chainvigil.cadence import STRETCH_AFTER, SnapshotCadence
from chainvigil.comparisons import Comparisons
from chainvigil.events import EventLog
from chainvigil.ingest import Ingest, RunState
from chainvigil.joint_passes import JointPasses
from chainvigil.longrun import KEEP_DRAWS, KEEP_WINDOW, REFF_FLOOR, TAIL_LAG, RunSubsampledScorer
from chainvigil.mixing_schedule import MixingSchedule
from chainvigil.readers import ReadOptions
from chainvigil.refit_service import RefitService
from chainvigil.reports import problem_line, snapshot_line
from chainvigil.rules import RUN_INFO_FILE, SIGNAL_FILE, STATE_DIR_NAME, finite_or_none, run_state
from chainvigil.signals import (OutsideRoot, enough_environment, parse_command, run_on_enough,
                                write_signal_inside)
from chainvigil.snapshot import draw_rate, mixing_rows, pointwise_values, snapshot_row, trail_point
from chainvigil.scorer_lifecycle import CHECKPOINT_SECONDS, ScorerLifecycle
from chainvigil.storage.draws import DrawStore
from chainvigil.subsampling import SUBSAMPLE_ABOVE, SUBSAMPLE_DIR, SampledStore
from chainvigil.storage.history import HistoryWriter

__all__ = ["Service", "ServiceError", "RunState", "STATE_DIR_NAME", "HISTORY_FILE", "STORE_DIR",
           "default_state_dir"]

HISTORY_FILE = "history.sqlite"
STORE_DIR = "draws.zarr"
LOCK_FILE = "service.lock"

# The verdict's trail is trimmed (chainvigil.verdict.bounded_trail) once it holds this many points and
# then each time it has doubled since the last trim.
TRAIL_TRIM_MIN = 16
# The service liveness row's heartbeat is renewed at most this often (a reader calls the service
# stopped when the heartbeat is older than a minute).
HEARTBEAT_SECONDS = 10.0
# Quiet time after a file-system event before the loop wakes: samplers write whole chunks or lines,
# so a short pause is enough to gather the chains' writes of one moment into one pass.
WATCH_QUIET_SECONDS = 0.1
# A full rescan of the root every so often catches anything the file-system events missed.
RESCAN_SECONDS = 5.0
# Back-off between retries after a failure of the state folder (seconds, doubling up to the max).
RETRY_FIRST, RETRY_MAX = 1.0, 30.0


class ServiceError(RuntimeError):
    """A problem that stops the service from starting (another instance, an unwritable state)."""


def default_state_dir(root: Path) -> Path:
    return Path(root) / STATE_DIR_NAME


@dataclass
class _Scored:
    """A run scored in this pass, waiting for the comparison and its verdict."""

    state: RunState
    scores: object
    now: float
    per_chain: int
    chains: int
    rate: float | None
    refresh_first: bool
    keep_pointwise: bool
    quiet: bool = False
    combined: dict | None = None  # the headline with exact refit values (chainvigil.refit_service)
    # draws per chain of the joint-MCSE pass these scores used (None: none), taken when scored: a
    # pass collected later in the same loop (while another run is scored) is for the next snapshot
    joint_pass: int | None = None


class Service:
    """The chainvigil service for one watched root.

    Parameters
    ----------
    root : folder holding one folder per run.
    state_dir : where the history and the draw store live (default ``ROOT/.chainvigil``).
    every : seconds between snapshots of a run that has new draws.
    targets : overrides of the verdict targets (from command-line flags).
    on_enough : a command line run once per run when its verdict first says enough; split once with
        ``shlex`` and run without a shell; the run's values arrive as ``CHAINVIGIL_*`` environment
        variables (``chainvigil.signals``).
    report : called with one line of text per snapshot or problem (the headless output).
    signal_enough : write ENOUGH.json into a run folder when it has enough draws.
    read_defaults : the root's read options (``chainvigil.readers.ReadOptions``: log-likelihood
        name, warm-up, thinning, parameter choice); each run's ``run.json`` overrides them.

    Warm-up draws are stored but left out of everything scored: the scorer, r_eff, the joint MCSE,
    mixing and the PSIS tail rebuild all start at each chain's warm-up count, and the draw counts of a
    snapshot (``draws``, ``draws_per_chain``) count post-warm-up draws.
    durable : fsync the draw store's new files (and their folders) before each manifest commit, so
        the commit log survives a power loss together with the draws it names (``--durable``).
    on_refits : a command line (split once, run without a shell) or a callable ``(path, run, folder)``
        run each time a run's REFITS.json is written; the command gets ``CHAINVIGIL_REFITS``,
        ``CHAINVIGIL_RUN``, ``CHAINVIGIL_FOLDER`` and ``CHAINVIGIL_STATE`` (``chainvigil.refit_service``).
    write_refits : write REFITS.json into a run folder when observations need refits.
    stretch : let the snapshot interval of a settled, unchanging run grow to ``STRETCH_MAX``.
    stretch_after : seconds a run must stay unchanged before its interval stretches.
    pass_delay : seconds added to every joint-MCSE store pass (a knob for tests and benchmarks that
        need a slow pass; the pass runs off the loop either way).
    scorer_factory, checkpoint_every, keep_draws, reff_floor, keep_window, subsample,
    subsample_above, subsample_seed, tail_lag : how each run's scorer is made, checkpointed and what the
        store keeps (``chainvigil.scorer_lifecycle.ScorerLifecycle``, where each is described).
    """

    def __init__(self, root, state_dir=None, *, every: float = 5.0, poll: bool = False,
                 targets: dict | None = None, on_enough: str | None = None,
                 report: Callable[[str], None] | None = None, signal_enough: bool = True,
                 read_defaults: ReadOptions | None = None, scorer_factory: Callable | None = None,
                 durable: bool = False, on_refits=None, write_refits: bool = True,
                 checkpoint_every: float = CHECKPOINT_SECONDS, stretch: bool = True,
                 stretch_after: float = STRETCH_AFTER, pass_delay: float = 0.0,
                 keep_draws: str = "all", reff_floor: float = REFF_FLOOR, keep_window: int = KEEP_WINDOW,
                 subsample: int | None = None, subsample_above: int | None = SUBSAMPLE_ABOVE,
                 subsample_seed: int = 0, tail_lag: float = TAIL_LAG):
        self.root = Path(root).resolve()
        if not self.root.is_dir():
            raise ServiceError(f"{root}: not a folder to watch")
        self.state_dir = Path(state_dir).resolve() if state_dir else default_state_dir(self.root)
        self.every = float(every)
        self.poll = poll
        self.target_overrides = dict(targets or {})
        self.on_enough = parse_command(on_enough) if on_enough else None
        self.report = report or (lambda line: None)
        self.signal_enough = signal_enough
        self.read_defaults = read_defaults
        if keep_draws not in KEEP_DRAWS:
            raise ServiceError(f"--keep-draws {keep_draws!r}: choose one of {', '.join(KEEP_DRAWS)}")
        if keep_draws != "all" and scorer_factory is not None:
            raise ServiceError(f"--keep-draws {keep_draws} needs the in-process scorer (its checkpoint "
                               "replaces the dropped draws); use --keep-draws all with --cluster")
        if not reff_floor > 0 or int(keep_window) < 0:
            raise ServiceError(f"r_eff floor must be > 0 and the kept window >= 0 (got {reff_floor}, "
                               f"{keep_window})")
        if not 0.0 <= float(tail_lag) < 1.0:
            raise ServiceError(f"--tail-lag {tail_lag}: choose a fraction in [0, 1)")
        self.durable = bool(durable)
        if subsample is not None and int(subsample) < 2:
            raise ServiceError(f"subsample size must be at least 2 observations, got {subsample}")
        # the parts that do the work (each holds this service for its store, history, runs, events)
        self.scorers = ScorerLifecycle(self, scorer_factory=scorer_factory, keep_draws=keep_draws,
                                       reff_floor=reff_floor, keep_window=keep_window, subsample=subsample,
                                       subsample_above=subsample_above, subsample_seed=subsample_seed,
                                       checkpoint_every=checkpoint_every, tail_lag=tail_lag)
        self.passes = JointPasses(self, delay=pass_delay)
        self.mixing = MixingSchedule(self)
        self.cadence = SnapshotCadence(self, stretch=stretch, stretch_after=stretch_after)
        self.comparisons = Comparisons(self)
        self._restore_pending = False  # a failed pass whose restore from the commit log failed too
        if isinstance(on_refits, str):
            on_refits = parse_command(on_refits, "--on-refits")
        self.refits = RefitService(self, write=write_refits, on_refits=on_refits)
        self._stop = threading.Event()
        self._changed: queue.Queue = queue.Queue()
        self._lock_handle = None
        self._last_beat = 0.0
        self.final_pass = False  # set for the last cycle of a clean stop: exact PSIS tails there
        self._open_state()

    # ------------------------------------------------------------------ the state folder
    def _open_state(self):
        """Create/lock the state folder, open the history and the store, restore every run."""
        try:
            self.state_dir.mkdir(parents=True, exist_ok=True)
        except OSError as err:
            raise ServiceError(f"{self.state_dir}: cannot create the state folder ({err})") from err
        self._take_lock()
        try:
            self.history = HistoryWriter(self.state_dir / HISTORY_FILE)
        except sqlite3.Error as err:
            self.close()
            raise ServiceError(f"{self.state_dir / HISTORY_FILE}: cannot open the history ({err})") from err
        self.store = SampledStore(DrawStore(self.state_dir / STORE_DIR, durable=self.durable),
                                  self.state_dir / SUBSAMPLE_DIR)
        self.events = EventLog(self.history, self.report)
        for problem in self.store.load_records():
            self.event("warning", "subsample_record", problem, once=False)
        self.ingest = Ingest(self.root, self.store, self.events, history=self.history,
                             ignore=(self.state_dir,), make_scorer=self.scorers.new_scorer,
                             read_defaults=self.read_defaults, resume_scorer=self.scorers.resume_scorer)
        self.ingest.stop_requested = self._stop.is_set
        self.ingest.recover()
        for state in self.ingest.runs.values():
            self._restore_snapshot_state(state)

    def _take_lock(self):
        path = self.state_dir / LOCK_FILE
        try:
            handle = open(path, "a+")
        except OSError as err:
            raise ServiceError(f"{self.state_dir}: cannot write the lock file ({err})") from err
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

    def _restore_snapshot_state(self, state: RunState):
        """What the latest snapshot of a run tells the loop (after a restart)."""
        run_row = self.history.run(state.name) or {}
        last = self.history.latest_snapshot(state.name)
        if not last:
            return
        state.draws_at_snapshot = last["draws"]
        state.signalled = bool(run_row.get("enough_at"))
        # only the part of the trail the verdict can still use (chainvigil.verdict.bounded_trail)
        state.trail = verdicts.TrailIndex(verdicts.TrailPoint(p) for p in verdicts.bounded_trail(
            self.history.trail_points(state.name), self._targets(state),
            chains=max(1, int(last.get("chains") or 1))))
        state.trail_trimmed = len(state.trail)
        state.last_verdict, state.k_max, state.loo_mcse = last.get("verdict"), last["k_max"], last["loo_mcse"]
        values = np.array([r["elpd_loo"] if r["elpd_loo"] is not None else np.nan
                           for r in self.history.pointwise(state.name)], dtype=float)
        state.pointwise_loo = values if values.size else None
        self.mixing.restore(state, last)

    @property
    def runs(self) -> dict[str, RunState]:
        return self.ingest.runs

    def event(self, level: str, kind: str, message: str, run: str | None = None, file=None, once=True):
        """Record an event in the history; repeated identical problems are recorded once."""
        self.events.event(level, kind, message, run=run, file=file, once=once)

    def scan(self, only: set | None = None):
        """Look at the root (or only the named runs) and ingest whatever is new."""
        self.ingest.scan(only)

    # ------------------------------------------------------------------ scoring
    def snapshot_due(self, state: RunState, now: float) -> bool:
        """Is the run's snapshot due now (``chainvigil.cadence``)?"""
        return self.cadence.due(state, now)

    def checkpoint_now(self) -> None:
        """Write every run's checkpoint now (after a commit; the clean stop does this too)."""
        self.scorers.checkpoint_now()

    def chain_lengths(self, state: RunState) -> dict:
        """Post-warm-up draws per chain (what is scored), from the scorer, which saw every appended
        post-warm-up draw: no store lookup."""
        if state.scorer is not None:
            return {str(c): v for c, v in sorted(state.scorer.chain_draws().items())}
        warmup = self.ingest.warmup_counts(state)
        return {c: self.store.length(state.name, c) - warmup.get(c, 0)
                for c in sorted(self.store.chains(state.name))}

    def _score(self, state: RunState, *, force_r_eff: bool = False) -> _Scored | None:
        """Score one run (no verdict yet); keep its pointwise elpd_loo and MCSE for the comparison."""
        if state.scorer is None or state.scorer.draws == 0:
            return None
        now = time.time()
        lengths = self.chain_lengths(state)
        per_chain = min(lengths.values()) if lengths else 0
        quiet = self.cadence.quiet(state, now)
        # r_eff: the streaming estimate, current at every snapshot (live and final alike); the joint
        # MCSE's store pass runs off the loop and its last result is applied as a ratio.
        self.passes.collect()
        state.r_eff = state.scorer.r_eff() if hasattr(state.scorer, "r_eff") else None
        if state.r_eff is not None:
            self.passes.start(state, per_chain, state.r_eff, force=force_r_eff or quiet)
        rebuilds = state.scorer.rebuilds
        try:
            r_used, short_note = self.scorers.fit_buffer(state, state.r_eff)
            self.scorers.set_tail_lag(state.scorer, final=self.final_pass)
            scores = state.scorer.scores(r_used)
        except ValueError as err:
            self.event("warning", "not_scored", f"run '{state.name}' could not be scored yet: {err}",
                       run=state.name)
            return None
        if state.scorer.rebuilds > rebuilds:
            self.event("info", "rebuild", f"run '{state.name}': the PSIS tail buffer grew to "
                       f"{state.scorer.k} draws per observation (reread from the draw store)",
                       run=state.name, once=False)
        scores.run = state.name
        self.passes.apply(state, scores, per_chain)
        notes = ([short_note] if short_note else []) + self.scorers.retention_notes(state, per_chain)
        state.retention_note = "; ".join(notes) or None
        scores.mixing = self.mixing.figures(state, per_chain, refresh=force_r_eff or quiet)
        state.rate_window.append((now, per_chain))
        combined = self.refits.combine(state, scores)  # exact refit values where finished (before comparing)
        if combined is not None:
            state.pointwise_loo = np.array(combined["pointwise"], dtype=float)
            state.loo_mcse = finite_or_none(combined["loo"]["mcse"])
        elif scores.subsampled:
            # the others' values are approximations: a subsampled run is not compared (docs/architecture.md)
            state.pointwise_loo = None
            state.loo_mcse = finite_or_none(scores.loo.get("mcse"))
        else:
            state.pointwise_loo = np.array(scores.loo_pointwise, dtype=float)
            state.loo_mcse = finite_or_none(scores.loo.get("mcse"))
        return _Scored(state, scores, now, per_chain, len(lengths), draw_rate(state.rate_window),
                       False, force_r_eff, quiet, combined,
                       joint_pass=state.r_eff_per_chain if state.joint_mcse is not None else None)

    def _targets(self, state: RunState):
        defaults = self.refits.default_targets(state)
        try:
            return verdicts.Targets.from_sources(defaults, state.info.get("targets"), self.target_overrides)
        except ValueError as err:
            path = state.folder / RUN_INFO_FILE
            self.event("warning", "bad_run_info", f"{path}: targets ignored ({err})", run=state.name,
                       file=path)
            return verdicts.Targets.from_sources(defaults, None, self.target_overrides)

    def _finish(self, scored: _Scored, comparison) -> dict:
        """Verdict, snapshot row, run state, headless line and side effects of one scored run."""
        state, scores = scored.state, scored.scores
        labels = self.ingest.labels(state)
        if labels and len(labels) != state.n:
            labels = None
        targets = self._targets(state)

        def judge(combined):
            data = scores.to_dict()
            exact = self.refits.apply(state, data, combined)
            key = (data["loo"].get("method"), data["loo"].get("exact_observations"))
            if state.trail and getattr(state, "_headline_key", key) != key:
                # the headline jumped (an exact value arrived): "settled" starts afresh
                state.trail = verdicts.TrailIndex()
            state._headline_key = key
            if not isinstance(state.trail, verdicts.TrailIndex):  # indexed once, then appended to
                state.trail = verdicts.TrailIndex(state.trail)
            own = data["loo"].get("mcse_own")  # mixed: the MCSE part this run's draws can lower
            judged = data if own is None else {**data, "loo": {**data["loo"], "mcse": own}}
            verdict = verdicts.evaluate(judged, state.trail, chains=scored.chains,
                                        activity=self.cadence.activity(state, scored.now),
                                        # compared runs that stopped growing: their MCSE part is fixed
                                        finished_runs=[s.name for s in self.runs.values() if s is not state and (
                                            s.signalled or scored.now - s.last_growth > max(2 * self.every, 2.0))],
                                        draws_per_chain=scored.per_chain, draw_rate=scored.rate,
                                        targets=targets, labels=labels, comparison=comparison,
                                        exact=exact, refit_run=self.refits.is_refit(state))
            return data, verdict

        data, verdict = judge(scored.combined)
        if self.refits.after_verdict(state, scores, verdict, now=scored.now):
            # the set of refits changed: the flagged observations are pending from this snapshot on
            scored.combined = self.refits.combine(state, scores)
            data, verdict = judge(scored.combined)
        if state.retention_note:  # the snapshot and its verdict say what is approximate
            data["retention_note"] = verdict["retention_note"] = state.retention_note
        scores.verdict = verdict
        data["verdict"] = verdict
        row = snapshot_row(data, scored.now, scored.per_chain, scored.rate, scores.r_eff,
                           r_eff_source="streaming" if state.r_eff is not None else None,
                           joint_pass=scored.joint_pass, loo_lagged=getattr(state.scorer, "lagged_rows", None))
        more = verdicts.parameter_projections(data.get("mixing"), chains=scored.chains,
                                              draws_per_chain=scored.per_chain, targets=targets)
        snapshot_id = self.history.add_snapshot(state.name, row, mixing_rows(data, more),
                                                pointwise_values(data, labels, only=self._sampled(state)),
                                                keep_pointwise=scored.keep_pointwise)
        # keep only what later verdicts read, so a snapshot costs the same however many came before;
        # trimmed each time the trail has doubled since the last trim (amortised: a trim walks the
        # whole trail), which gives later verdicts the same input as trimming at every snapshot
        state.trail.append(verdicts.TrailPoint(trail_point(row)))
        if len(state.trail) >= max(2 * state.trail_trimmed, TRAIL_TRIM_MIN):
            previous = state.trail[-2]["draws_per_chain"] if len(state.trail) > 1 else None
            state.trail = verdicts.TrailIndex(verdicts.bounded_trail(
                state.trail, self._targets(state), chains=scored.chains, upto=previous))
            state.trail_trimmed = len(state.trail)
        state.draws_at_snapshot = state.scorer.draws
        state.snapshot_r_eff_per_chain = scored.joint_pass if scored.joint_pass is not None else -1
        state.last_snapshot = scored.now
        state.last_verdict, state.k_max = verdict, data["pareto_k"]["max"]
        new_state = run_state(verdict, data["pareto_k"]["max"])
        self.cadence.watch(state, (new_state, verdict.get("passed"), scored.quiet), scored.now)
        self.history.set_run_state(state.name, new_state)
        self.report(snapshot_line(state.name, data, scored.per_chain, scored.chains,
                                  verdicts.describe(verdict)
                                  + (f" [approximate: {state.retention_note}]" if state.retention_note else "")))
        if verdict["enough"] and not state.signalled:
            self._signal_enough(state, verdict, data, scored)
        return {"id": snapshot_id, **data}

    def _sampled(self, state: RunState):
        """The sampled observations of a subsampled run (its pointwise rows), else None (all)."""
        scorer = state.scorer
        return scorer.sample if isinstance(scorer, RunSubsampledScorer) else None

    def take_snapshot(self, state: RunState, *, force_r_eff: bool = False) -> dict | None:
        """Score one run alone (comparison from the values in memory), write its snapshot row."""
        scored = self._score(state, force_r_eff=force_r_eff)
        if scored is None:
            return None
        comparisons = self.compare()
        return self._finish(scored, comparisons.get(state.info.get("dataset")))

    # ------------------------------------------------------------------ side effects
    def _signal_enough(self, state: RunState, verdict: dict, data: dict, scored: _Scored):
        state.signalled = True
        self.refits.on_enough(state)
        self.history.set_run_state(state.name, "enough", enough_at=scored.now)
        path = None
        if self.signal_enough:
            try:
                path = write_signal_inside(self.root, state.folder, verdict, data["draws"], scored.now)
            except OutsideRoot as err:
                self.event("warning", "signal_refused", f"{SIGNAL_FILE} not written: {err}",
                           run=state.name, file=state.folder)
            except OSError as err:
                self.event("warning", "signal_failed", f"{state.folder}: cannot write {SIGNAL_FILE} ({err})",
                           run=state.name, file=state.folder)
        self.event("info", "enough", f"run '{state.name}' has enough draws ({data['draws']} in all)"
                   + (f"; wrote {path}" if path else ""), run=state.name, file=path)
        if self.on_enough:
            env = enough_environment(run=state.name, folder=state.folder, draws=data["draws"],
                                     draws_per_chain=scored.per_chain, enough_file=path,
                                     state_dir=self.state_dir)
            try:
                run_on_enough(self.on_enough, env, cwd=self.state_dir)
            except OSError as err:
                self.event("warning", "on_enough_failed", f"--on-enough command failed to start: {err}",
                           run=state.name)

    # ------------------------------------------------------------------ comparison
    def compare(self) -> dict:
        """Compare, per data set, every run with in-memory pointwise values; write one round per data
        set and return ``{dataset: rows}`` (best first) for this pass's verdicts
        (``chainvigil.comparisons``)."""
        return self.comparisons.compare()

    # ------------------------------------------------------------------ the loop
    def _on_change(self, runs: set):
        self._changed.put(set(runs))

    def stop(self):
        self._stop.set()
        self._changed.put(set())

    def _score_all(self, states: list, force: bool) -> list:
        """Score each run (the per-run error boundary: a failing run is set aside)."""
        scored = []
        for state in states:
            try:
                result = self._score(state, force_r_eff=force and self.cadence.stale(state))
            except (sqlite3.Error, OSError):
                raise  # the state folder, not this run: handled by the loop
            except Exception as err:  # the per-run error boundary (scoring)
                self.ingest.set_aside(state, "scoring", err)
                continue
            if result is not None:
                scored.append(result)
        return scored

    def _finish_guarded(self, item, comparison) -> None:
        try:
            self._finish(item, comparison)
        except (sqlite3.Error, OSError):
            raise  # the state folder, not this run: handled by the loop
        except Exception as err:
            self.ingest.set_aside(item.state, "scoring", err)

    def cycle(self, changed: set | None = None, *, force: bool = False):
        """One pass: ingest (all runs, or the changed ones), score what is due, compare, verdicts."""
        if not (self.state_dir / HISTORY_FILE).is_file():  # SQLite would write on into a deleted file
            raise FileNotFoundError(f"{self.state_dir / HISTORY_FILE}: the history file is gone")
        try:
            self.scan(changed)
            self.refits.after_restore(self.history)
            now = time.time()
            due = [state for state in list(self.runs.values())
                   if (force and self.cadence.stale(state)) or self.snapshot_due(state, now)]
            # Refit runs first, scored and finished: a refit that reaches its verdict in this pass
            # counts as finished in its parent's headline of the same pass.  A refit is not a model
            # of its own, so it is neither compared nor judged against a comparison.
            refit_runs = [state for state in due if self.refits.is_refit(state)]
            scored = self._score_all(refit_runs, force)
            for item in scored:
                self._finish_guarded(item, None)
            models = self._score_all([state for state in due if not self.refits.is_refit(state)], force)
            comparisons = self.compare() if models else {}
            for item in models:
                self._finish_guarded(item, comparisons.get(item.state.info.get("dataset")))
            scored += models
        finally:
            self.ingest.commit_pending()
        # after the commit: run states that follow activity, the heartbeat, and checkpoints of
        # exactly the committed draws
        now = time.time()
        done = {item.state.name for item in scored}
        for state in list(self.runs.values()):
            if state.name not in done:
                self.cadence.follow_activity(state, now)
        if now - self._last_beat >= HEARTBEAT_SECONDS or force:
            self.history.service_beat(now=now)
            self._last_beat = now
        for state in list(self.runs.values()):
            self.scorers.checkpoint(state, now, force=force)
        self.scorers.drop_covered()

    def _state_failure(self, err: BaseException, delay: float) -> None:
        """Report a failure of the state folder (a storage problem, never bad input); reopen it if it
        was deleted, else restore every run from the commit log, so the retried pass reads again
        exactly what was not committed.  When the restore itself fails (the disk still full) it is
        done again before the next pass."""
        self.report(problem_line(None, f"state folder {self.state_dir}: {type(err).__name__}: {err}; "
                                 f"retrying in {delay:.0f} s"))
        try:
            if not (self.state_dir / HISTORY_FILE).is_file():
                self.close()
                try:
                    self.history.close()
                except Exception:
                    pass
                self._open_state()
                self._restore_pending = False
                self.event("error", "state_reopened", f"{self.state_dir}: the state folder was lost "
                           f"({type(err).__name__}: {err}); started a new one", once=False)
            else:
                self._restore_pending = True
                self.event("error", "storage_failed", f"{self.state_dir}: {type(err).__name__}: {err}; "
                           "nothing uncommitted is kept, the pass is retried", once=False)
                self._restore_from_commit_log()
        except Exception as again:
            self.report(problem_line(None, f"state folder {self.state_dir} still failing: "
                                     f"{type(again).__name__}: {again}"))

    def _restore_from_commit_log(self):
        """Drop what the failed pass read and cut every chain back to the commit log."""
        self.ingest._uncommitted.clear()
        known = {row["name"]: row for row in self.history.runs()}
        for name in list(self.ingest.runs):
            if name not in known:  # never recorded: forget it; the next pass reads it afresh
                for chain in self.store.chains(name):
                    self.store.truncate(name, chain, 0)
                del self.ingest.runs[name]
        for run_row in known.values():
            self.ingest.restore_run(run_row)
        self._restore_pending = False

    def _guarded_cycle(self, changed=None, *, force=False) -> bool:
        """A pass that survives state-folder failures (reported; False when it failed)."""
        try:
            if self._restore_pending:
                self._restore_from_commit_log()
                changed = None  # everything, after a restore
            self.cycle(changed, force=force)
            self._retry_delay = RETRY_FIRST
            return True
        except (sqlite3.OperationalError, sqlite3.DatabaseError, OSError) as err:
            delay = getattr(self, "_retry_delay", RETRY_FIRST)
            self._state_failure(err, delay)
            self._stop.wait(delay)
            self._retry_delay = min(2 * delay, RETRY_MAX)
            return False

    def run(self, *, duration: float | None = None):
        """Watch until stopped (``stop()``, SIGINT/SIGTERM in the CLI) or for ``duration`` seconds."""
        from chainvigil.watcher import FolderWatcher

        deadline = time.time() + duration if duration else None
        self.event("info", "service_started", f"watching {self.root} (state in {self.state_dir})", once=False)
        self.history.service_beat(started=True)
        watcher = FolderWatcher(self.root, self._on_change, poll=self.poll, ignore=(self.state_dir,),
                                debounce=WATCH_QUIET_SECONDS)
        watcher.start()
        crashed = None
        try:
            self._guarded_cycle()
            last_rescan = time.time()
            retry_all = False
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
                if retry_all or time.time() - last_rescan >= RESCAN_SECONDS:
                    retry_all = not self._guarded_cycle()
                    last_rescan = time.time()
                else:
                    retry_all = not self._guarded_cycle(changed)
        except BaseException as err:
            crashed = err
            raise
        finally:
            watcher.stop()
            self.finish(crashed=crashed)

    def finish(self, crashed: BaseException | None = None):
        """Final pass: ingest what is there, snapshot every run that grew, release the state folder.

        After a crash of the loop the event is ``service_crashed`` with the traceback summary."""
        try:
            if crashed is None or isinstance(crashed, KeyboardInterrupt):
                try:
                    self.scan()  # ingest what is there, then a pass over every run's final draws
                    self.passes.final()
                except (sqlite3.Error, OSError):
                    pass  # the state folder: the guarded cycle below reports it
                self.final_pass = True
                self._guarded_cycle(force=True)
        finally:
            try:
                if crashed is not None and not isinstance(crashed, KeyboardInterrupt):
                    summary = "".join(traceback.format_exception(crashed, limit=-4)).strip()
                    self.event("error", "service_crashed", f"the service loop crashed: "
                               f"{type(crashed).__name__}: {crashed}\n{summary}", once=False)
                    self.history.service_beat(crashed=True)
                else:
                    self.event("info", "service_stopped", "service stopped", once=False)
                    self.history.service_beat(stopped=True)
            except Exception:
                pass
            self.passes.worker.close()
            self.scorers.wait_written()
            try:  # drops a pass held back (the worker has stopped)
                self.scorers.drop_covered()
            except Exception as err:
                self.report(problem_line(None, f"old log-likelihood draws not dropped: {err}"))
            self.close()

    def close(self):
        if self._lock_handle is not None:
            try:
                fcntl.flock(self._lock_handle, fcntl.LOCK_UN)
                self._lock_handle.close()
            finally:
                self._lock_handle = None

