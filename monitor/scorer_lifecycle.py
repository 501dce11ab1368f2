"""The per-run scorer lifecycle: how each run's scorer is made, resumed, checkpointed, and the
store retention that rests on its checkpoints (docs/architecture.md, docs/storage.md "Retention").

One :class:`ScorerLifecycle` per service (``Service.scorers``) owns:

* making a run's scorer (:meth:`ScorerLifecycle.new_scorer`, handed to ``chainvigil.ingest``): a
  ``RunScorer`` (or the ``scorer_factory``'s), a ``RunSubsampledScorer`` for a subsampled run (its
  sample recorded the first time), the PSIS tail buffer sized up front under ``--keep-draws
  tail``/``none``, and the readers a tail rebuild uses (or none when the store no longer keeps the
  draws);
* resuming it from the run's checkpoint (:meth:`ScorerLifecycle.resume_scorer`) when the checkpoint
  fits the commit log, else re-streaming a subsampled run from its files;
* writing checkpoints after a manifest commit (:meth:`ScorerLifecycle.checkpoint`, off the loop
  thread), and ``checkpoint_now`` on a clean stop;
* retention: which runs drop their stored log-likelihood draws, dropping what a written checkpoint
  covers (:meth:`ScorerLifecycle.drop_covered`, never under a running joint-MCSE pass of that run),
  the r_eff raised when a buffer that cannot reread is too small (:meth:`ScorerLifecycle.fit_buffer`),
  and the notes a snapshot carries when its joint MCSE cannot see every draw.

The service decides when (after each commit, on a clean stop); this module decides how.
"""
from __future__ import annotations

import threading
import time

import numpy as np

from chainvigil.estimators.subsample import subsample_indices
from chainvigil.ingest import RunState
from chainvigil.longrun import (DEFAULT_PLANNED_DRAWS, KEEP_WINDOW, REFF_FLOOR, RUN_SCORERS, TAIL_LAG, CheckpointMismatch,
                                RunScorer, RunSubsampledScorer, checkpoint_path, checkpoint_state,
                                fit_r_eff_to_buffer, load_checkpoint, planned_buffer_size, write_checkpoint)
from chainvigil.readers import CsvChainReader
from chainvigil.reports import problem_line
from chainvigil.subsampling import SUBSAMPLE_ABOVE, run_seed, subsample_size
from chainvigil.service_part import ServicePart

__all__ = ["ScorerLifecycle", "CHECKPOINT_SECONDS"]

# A run's checkpoint (scorer + streaming r_eff + the committed draws they cover) is rewritten after a
# manifest commit when it is older than this (seconds) and the run grew; and on a clean stop.
CHECKPOINT_SECONDS = 60.0


class ScorerLifecycle(ServicePart):
    """Each run's scorer from its making to its checkpoints, and the store retention (module docstring).

    Parameters
    ----------
    service : the ``chainvigil.service.Service`` (its state folder, store, history, ingest, refits,
        runs, events and joint-MCSE passes).
    scorer_factory : makes each run's scorer, called as ``factory(n, n_params=, point_loglik=,
        reader=)``; default ``StreamingScorer`` (in this process). ``chainvigil.cluster`` gives one
        that shards the state over a Dask cluster.
    checkpoint_every : seconds between checkpoints of a growing run (``chainvigil.longrun``).
    keep_draws : "all" (default), "tail" or "none": which stored log-likelihood draws are kept once a
        committed checkpoint covers them (``--keep-draws``; docs/storage.md, "Retention").  In "tail"
        and "none" each run's PSIS tail buffer is sized up front from run.json ``draws_expected`` and
        ``reff_floor`` (``chainvigil.longrun.planned_buffer_size``) and never reread from the store.
    reff_floor : the smallest r_eff the planned buffer covers (``chainvigil.longrun.REFF_FLOOR``).
    tail_lag : how stale a cached PSIS tail fit may be in a live snapshot (``chainvigil.longrun.TAIL_LAG``,
        ``--tail-lag``); the final snapshot of a clean stop refits every changed tail.
    keep_window : draws per chain "tail" keeps behind the last checkpoint (the joint-MCSE window).
    subsample, subsample_above : which runs are scored from a random subsample of their observations
        (``chainvigil.subsampling.subsample_size``): with ``subsample`` = M every run with more than M
        observations; else runs with more than ``subsample_above`` observations (0/None: never), with
        M = ``SUBSAMPLE_M``.  Such a run's scorer is a ``RunSubsampledScorer`` (in this process, also
        with a cluster), its draw store keeps the sampled columns only (whatever ``keep_draws`` says), its
        ``loo.mcse`` is the scorer's draws error (the joint-MCSE pass result is not applied to it),
        its pointwise rows are the sampled observations', it is not compared with other runs, and
        its subsampling SE is reported beside the MCSE, not in it (docs/verdict.md).
    subsample_seed : the service's part of each run's sample seed (``chainvigil.subsampling.run_seed``).
    (The ``Service`` checks these values before they get here.)
    """

    def __init__(self, service, *, scorer_factory=None, keep_draws: str = "all", reff_floor: float = REFF_FLOOR,
                 keep_window: int = KEEP_WINDOW, subsample: int | None = None,
                 subsample_above: int | None = SUBSAMPLE_ABOVE, subsample_seed: int = 0,
                 checkpoint_every: float = CHECKPOINT_SECONDS, tail_lag: float = TAIL_LAG):
        super().__init__(service)
        self.tail_lag = float(tail_lag)
        self.scorer_factory = scorer_factory  # None: RunScorer (streaming, with its streaming r_eff)
        self.keep_draws = keep_draws
        self.reff_floor = float(reff_floor)
        self.keep_window = int(keep_window) if keep_draws == "tail" else 0
        self.subsample = None if subsample is None else int(subsample)
        self.subsample_above = subsample_above
        self.subsample_seed = int(subsample_seed)
        self.checkpoint_every = float(checkpoint_every)
        # run -> {chain: store position} a written checkpoint covers: dropped below (minus the window)
        # on the loop thread once no joint-MCSE pass of that run reads the store
        self._droppable: dict = {}
        self._droppable_lock = threading.Lock()
        # run -> (time, (scorer draws, joint-MCSE pass draws per chain)) of its last checkpoint
        self._checkpointed: dict = {}
        self._writing: threading.Thread | None = None  # the checkpoint being written, if any

    def drop_pending(self, run: str) -> bool:
        """True while a written checkpoint allows drops of the run that are not done yet."""
        return run in self._droppable

    def set_tail_lag(self, scorer, *, final: bool = False) -> None:
        """Give ``scorer`` the tail lag of a live snapshot, or 0 for the final one (a scorer without
        a tail cache, e.g. a cluster's, has none to set)."""
        if hasattr(scorer, "tail_lag"):
            scorer.tail_lag = 0.0 if final else self.tail_lag

    def wait_written(self) -> None:
        """Wait for the checkpoint being written, if any."""
        if self._writing is not None:
            self._writing.join()

    # ------------------------------------------------------------------ making, resuming, checkpoints
    def new_scorer(self, state: RunState):
        name = state.name
        sample = self.store.sample(name)
        m = len(sample) if sample is not None else subsample_size(state.n, self.subsample, self.subsample_above)
        if sample is None and self.refits.is_refit(state):
            m = None  # a refit run's columns are its held-out observations: always exact
        if sample is None and m is not None and any(self.store.length(name, c) for c in self.store.chains(name)):
            # its store holds every column already (scored in full before): it stays a full run
            self.event("info", "not_subsampled", f"run '{name}' was scored over all {state.n:,} observations "
                       "before; it stays so (a subsample is chosen only for a new run)", run=name)
            m = None
        if m is not None:
            return self._new_subsampled_scorer(state, m, sample)
        planned = {}
        if self.retained(state):
            planned["initial_k"] = self._planned_k(state)
            expected = state.info.get("draws_expected")
            self.event("info", "retention_plan",
                       f"run '{state.name}': --keep-draws {self.keep_draws}: the PSIS tail buffer holds "
                       f"K = {planned['initial_k']} values per observation, enough for "
                       f"{expected or DEFAULT_PLANNED_DRAWS:,} draws at r_eff >= {self.reff_floor:g}"
                       + ("" if expected else " (run.json gives no draws_expected: the default plan)")
                       + f"; about {2 * planned['initial_k'] * 8 * state.n / 1e6:.3g} MB in memory",
                       run=state.name)
        return (self.scorer_factory or RunScorer)(
            state.n,
            n_params=state.info.get("n_params") or self.ingest.param_count(state),
            point_loglik=state.info.get("point_loglik"),
            reader=self._tail_reader(state), **planned,
        )

    def retained(self, state: RunState) -> bool:
        """True when ``--keep-draws tail``/``none`` drops this run's stored log-likelihoods: never a
        refit run (its exact elpd reads every draw) nor a subsampled one (its store holds m columns)."""
        return (self.keep_draws != "all" and not self.refits.is_refit(state)
                and self.store.sample(state.name) is None)

    def _planned_k(self, state: RunState) -> int:
        return planned_buffer_size(state.info.get("draws_expected"), self.reff_floor)

    def dropped(self, state: RunState) -> bool:
        """True when some post-warm-up log-likelihood draw of the run is no longer in the store."""
        warmup = self.ingest.warmup_counts(state)
        return any(self.store.kept_from(state.name, c) > warmup.get(c, 0) for c in self.store.chains(state.name))

    def _tail_reader(self, state: RunState):
        """The PSIS tail rebuild's reader (every post-warm-up draw, from the store), or None when the
        store does not keep them (``--keep-draws tail``/``none``, or a pruned run): the scorer then
        never rereads, and a buffer too small is flagged (``fit_buffer``)."""
        if self.retained(state) or self.dropped(state):
            return None
        name = state.name
        return lambda start, stop: self.store.read_all_loglik(
            name, start, stop, first=self.ingest.warmup_counts(state))

    def _sample_reader(self, name: str, sample: np.ndarray):
        """``column_reader`` of a subsampled run: every post-warm-up draw of the given sampled
        observations, from the store's sampled columns (stored in the order of the sample)."""
        def read(columns):
            pos = np.searchsorted(sample, np.asarray(columns))
            start, stop = int(pos[0]), int(pos[-1]) + 1
            if stop - start != len(pos):
                raise ValueError("the rebuild asks for sampled observations out of order")
            return self.store.read_all_loglik(name, start, stop, first=self.ingest.warmup_counts(self.runs[name]))
        return read

    def _new_subsampled_scorer(self, state: RunState, m: int, sample=None):
        """A ``RunSubsampledScorer`` of m sampled observations; the sample is recorded (and the store
        keeps only its columns) the first time."""
        name = state.name
        seed = run_seed(name, self.subsample_seed)
        new = sample is None
        if new:
            sample = subsample_indices(state.n, m, seed)
        scorer = RunSubsampledScorer(state.n, m, seed, sample=sample,
                                     column_reader=self._sample_reader(name, sample),
                                     n_params=state.info.get("n_params") or self.ingest.param_count(state),
                                     point_loglik=state.info.get("point_loglik"))
        if new:
            self.store.record(name, state.n, scorer.sample, seed)
            self.event("info", "subsampled", f"run '{name}' has {state.n:,} observations: PSIS-LOO is "
                       f"estimated from a random subsample of {m:,} of them (exact PSIS there, running "
                       "moments for all); the draw store keeps only their log-likelihood columns",
                       run=name)
        return scorer

    def resume_scorer(self, state: RunState):
        """The run's checkpoint, if it fits the commit log (the store is cut back to it already):
        ``(scorer, draws per chain it holds)``; None (and an event when one was there) otherwise."""
        path = checkpoint_path(self.state_dir, state.name)
        committed = self._committed_scored(state)
        name = state.name
        sample = self.store.sample(name)
        try:
            scorer, held = load_checkpoint(
                path, n=state.n, committed=committed, reader=self._tail_reader(state),
                column_reader=None if sample is None else self._sample_reader(name, sample))
            if isinstance(scorer, RunSubsampledScorer) != (sample is not None) or (
                    sample is not None and not np.array_equal(scorer.sample, sample)):
                raise CheckpointMismatch(f"{path}: the checkpoint's subsample does not match the run's "
                                         "recorded one")
        except FileNotFoundError:
            if sample is not None and any(committed.values()):
                self._restream(state, "it has no checkpoint")
            return None
        except CheckpointMismatch as err:
            if sample is not None:
                self._restream(state, f"its checkpoint cannot be used ({err})")
                return None
            self.event("warning", "checkpoint_ignored", f"{err}; the scores are rebuilt from the draw "
                       "store", run=state.name, file=path, once=False)
            return None
        if sample is not None and any(v > held.get(c, 0) for c, v in committed.items()):
            self._restream(state, "its checkpoint covers fewer draws than the commit log")
            return None
        if self.retained(state) and scorer.k < self._planned_k(state) and not self.dropped(state):
            # written with --keep-draws all (a buffer sized for rereading): every draw is still in the
            # store, so start afresh with the planned buffer instead
            self.event("info", "checkpoint_ignored", f"run '{name}': its checkpoint's PSIS tail buffer "
                       f"(K = {scorer.k}) is smaller than --keep-draws {self.keep_draws} plans "
                       f"({self._planned_k(state)}); the scores are rebuilt from the draw store",
                       run=name, file=path, once=False)
            return None
        scorer.n_params = state.info.get("n_params") or self.ingest.param_count(state)
        scorer.point_loglik = state.info.get("point_loglik")
        last_pass = getattr(scorer, "last_pass", None)
        if last_pass is not None and held and 4 <= last_pass[0] <= min(held.values()):
            # the last joint-MCSE pass stands until the run has grown enough for the next one, as
            # it would have without the restart (no pass over every stored draw at start)
            state.r_eff_per_chain, state.joint_mcse, state.joint_ratio = last_pass[0], last_pass[1], None
            self.service.passes.asked[state.name] = last_pass[0]
        self._checkpointed[state.name] = (time.time(), self._checkpoint_covers(state, scorer))
        return scorer, held

    @staticmethod
    def _checkpoint_covers(state: RunState, scorer) -> tuple:
        """What a checkpoint holds: the scorer's draws and the joint-MCSE pass it records."""
        return scorer.draws, state.r_eff_per_chain if state.joint_mcse is not None else None

    def _restream(self, state: RunState, why: str) -> None:
        """A subsampled run that cannot resume from its checkpoint (its store holds the sampled columns
        only, which cannot rebuild the other observations' moments): cut its chains back to nothing in
        the store and the commit log and read its files again from their start (an event says why).
        Called while the run is restored (start-up, a failed pass, a run set aside), before its
        scorer is made."""
        name = state.name
        for chain in self.store.chains(name):
            self.store.truncate(name, chain, 0)
        for row in self.history.chains(name):
            self.history.reset_chain(name, row["chain"])
        for feed in state.chains.values():
            feed.position, feed.last_draw, feed.warmup = 0, None, 0
            feed.identity, feed.same_as = None, None
            feed.waiting.clear()
            if feed.kind == "csv":
                feed.reader = CsvChainReader(feed.path, options=self.ingest.options_of(state))
            else:
                feed.taken = set()
                feed.known.clear()
                # the next pass lists the folder in full (its chunks are read again from the first)
                feed.last_chunk, feed.passes_since_listing, feed.listing_stamp = None, 0, None
        self.event("warning", "subsample_restream",
                   f"run '{name}' is scored from a subsample and its draw store keeps only the sampled "
                   f"observations' columns; {why}, so its draws are read again from its files",
                   run=name, once=False)

    def checkpoint(self, state: RunState, now: float, *, force: bool = False) -> None:
        """Write the run's checkpoint if due; only right after a commit (scorer == committed draws)."""
        scorer = state.scorer
        if not isinstance(scorer, RUN_SCORERS) or scorer.draws == 0 or state.aside_reason is not None:
            return
        last_time, last_covers = self._checkpointed.get(state.name, (0.0, None))
        covers = self._checkpoint_covers(state, scorer)
        if covers == last_covers or (not force and now - last_time < self.checkpoint_every):
            return
        counts = scorer.chain_draws()
        committed = self._committed_scored(state)
        if {str(c): v for c, v in counts.items()} != committed:
            return  # the store holds draws the scorer has not seen (or the reverse): not now
        if self._writing is not None and self._writing.is_alive():
            if not force:
                return  # the previous one is still being written: next pass
            self._writing.join()
        # copy the state now (it must match the commit), write it off the loop (large n: hundreds of MB)
        arrays = checkpoint_state(scorer, committed, last_pass=(state.r_eff_per_chain, state.joint_mcse))
        path = checkpoint_path(self.state_dir, state.name)
        # store positions the checkpoint covers (warm-up + scored draws per chain)
        warmup = self.ingest.warmup_counts(state)
        positions = {c: warmup.get(c, 0) + int(v) for c, v in committed.items()}
        drops = self.retained(state)
        name = state.name

        def write():
            try:
                write_checkpoint(path, arrays)
            except OSError as err:
                self.report(problem_line(state.name, f"{path}: checkpoint not written ({err})"))
                return
            if drops:  # durable now (fsync + rename): the draws it covers may go
                with self._droppable_lock:
                    self._droppable[name] = positions
        self._writing = threading.Thread(target=write, name="chainvigil-checkpoint", daemon=True)
        self._writing.start()
        if force:
            self._writing.join()
        self._checkpointed[state.name] = (now, covers)

    def drop_covered(self) -> None:
        """``--keep-draws tail``/``none``: release the log-likelihood chunks a written checkpoint
        covers (``tail`` keeps the last ``keep_window`` draws per chain), on the loop thread, never
        under a running joint-MCSE pass of that run (its frozen view reads those chunks)."""
        with self._droppable_lock:
            pending = list(self._droppable.items())
        for run, covers in pending:
            if run not in self.runs or self.runs[run].aside_reason is not None:
                continue
            # a running pass reads each chain from its view's first position on: drop below it only
            passes = self.service.passes
            reading = passes.first.get(run, {}) if passes.worker.busy(run) else {}
            complete = True
            try:
                for chain, position in covers.items():
                    target = max(0, position - self.keep_window)
                    if chain in reading and reading[chain] < target:
                        target, complete = reading[chain], False
                    if chain in self.store.chains(run):
                        self.store.drop_before(run, chain, target)
            except (KeyError, ValueError) as err:  # the store changed under it (a state folder reopened)
                complete = True
                self.event("warning", "drop_skipped", f"run '{run}': old log-likelihood draws not dropped "
                           f"({err}); they are dropped after the next checkpoint", run=run, once=False)
            if complete:
                with self._droppable_lock:
                    if self._droppable.get(run) is covers:
                        del self._droppable[run]

    def fit_buffer(self, state: RunState, r_eff):
        """The r_eff to score with, and a note when the PSIS tail buffer is too small.

        Only for a scorer that cannot reread the store (``_tail_reader`` is None): when some
        observation needs M + 1 > K values (r_eff below the floor the buffer was planned for, or the
        run outgrew its ``draws_expected``), its r_eff is raised so that M + 1 = K
        (``chainvigil.longrun.fit_r_eff_to_buffer``), an event names the run and K vs M + 1, and the
        snapshot carries the note.  Never a crash, never a silent change."""
        scorer = state.scorer
        if getattr(scorer, "reader", True) is not None or not hasattr(scorer, "k") or r_eff is None:
            return r_eff, None
        r_used, short, need = fit_r_eff_to_buffer(scorer.draws, scorer.k, r_eff)
        if not short.any():
            state.buffer_short = False
            return r_eff, None
        note = (f"PSIS tail buffer too small: K = {scorer.k} values per observation, M + 1 = {need} needed "
                f"for {int(short.sum())} observation(s) at {scorer.draws} draws (r_eff down to "
                f"{float(np.min(np.asarray(r_eff)[short])):.3g}); their k-hat uses the {scorer.k - 1} "
                "largest ratios and their MCSE a raised r_eff")
        if not getattr(state, "buffer_short", False):
            state.buffer_short = True
            self.event("warning", "tail_buffer_short", f"run '{state.name}': {note} (the dropped "
                       f"log-likelihood draws cannot be reread: --keep-draws {self.keep_draws}); give "
                       "run.json a larger draws_expected for the next run", run=state.name, once=False)
        return r_used, note

    def retention_notes(self, state: RunState, per_chain: int) -> list:
        """What the joint MCSE of this snapshot rests on when it cannot see every draw."""
        if self.keep_draws == "tail":
            if state.joint_mcse is not None and self.service.passes.window_only.get(state.name) \
                    and state.r_eff_per_chain < per_chain:
                return [f"joint MCSE from the kept window of the last {state.r_eff_per_chain} draws per chain, "
                        f"carried to {per_chain} by its ratio to the independent MCSE"]
            return []
        if not self.dropped(state):  # (with all: dropped by prune)
            return []
        if state.joint_mcse is None:
            return ["joint MCSE unavailable (the log-likelihood draws were dropped): loo_mcse treats the "
                    "observations' Monte Carlo errors as independent"]
        if state.r_eff_per_chain == per_chain:
            return []
        return [f"joint MCSE from the last pass (over {state.r_eff_per_chain} draws per chain; the draws were "
                f"dropped since), carried to {per_chain} by its ratio to the independent MCSE"]


    def _committed_scored(self, state: RunState) -> dict:
        """Per chain, the committed post-warm-up draws (what a checkpoint's scorer must hold)."""
        warmup = self.ingest.warmup_counts(state)
        return {c: self.store.length(state.name, c) - warmup.get(c, 0) for c in self.store.chains(state.name)}

    def checkpoint_now(self) -> None:
        """Write every run's checkpoint now (after a commit; the clean stop does this too)."""
        now = time.time()
        for state in list(self.runs.values()):
            self.checkpoint(state, now, force=True)
        self.drop_covered()

