"""The joint-MCSE passes of one service: when a run's pass over the stored draws is started, what
each finished pass gives its run, and how a snapshot's loo.mcse uses it (docs/numerics.md).

The pass itself (every draw of every observation, over a frozen view of the store) runs in the
background thread of ``chainvigil.longrun.JointPassWorker``; :class:`JointPasses` (``Service.passes``)
keeps its bookkeeping:

* :meth:`JointPasses.start`: a pass over the committed draws once draws per chain have grown by
  ``R_EFF_REFRESH_GROWTH`` since the last one (or when the run goes quiet); under ``--keep-draws
  tail`` over the kept window only; none for a subsampled run or one whose draws were dropped;
* :meth:`JointPasses.collect`: finished passes taken into their runs (``RunState.joint_mcse``,
  ``r_eff_per_chain``);
* :meth:`JointPasses.apply`: ``loo.mcse`` as the joint MCSE, exact when the last pass saw these draws,
  else the pass's joint/independent ratio applied to the streaming value;
* :meth:`JointPasses.final`: on a clean stop, one more pass over every run's final draws.

Per run it records the draws per chain of the last pass submitted (``asked``), the first store
position each chain of that pass reads (``first``: retention never drops below it while the pass
runs) and whether that pass covers only the kept window (``window_only``).
"""
from __future__ import annotations

import math
import time

from chainvigil.ingest import RunState
from chainvigil.longrun import RUN_SCORERS, JointPassWorker, RunSubsampledScorer
from chainvigil.service_part import ServicePart

__all__ = ["JointPasses", "R_EFF_REFRESH_GROWTH", "FINAL_PASS_WAIT"]

# The joint-MCSE store pass (off the loop, chainvigil.longrun) runs again when draws per chain have
# grown by this fraction since the last one (and once more when a run goes quiet).  r_eff itself is
# streamed (updated as draws arrive) and needs no pass.
R_EFF_REFRESH_GROWTH = 0.25
# On a clean stop the final snapshot waits this long at most for a joint-MCSE pass over the run's
# final draws, so the row people keep carries the exact joint MCSE (the same rule as a live snapshot
# whose draws a finished pass covers); past it the last pass's ratio is used, as live.
FINAL_PASS_WAIT = 60.0


class JointPasses(ServicePart):
    """The joint-MCSE pass bookkeeping of one service (module docstring).

    Parameters
    ----------
    service : the ``chainvigil.service.Service`` (its store, ingest, runs, events, scorer lifecycle).
    delay : seconds added to every pass (``Service(pass_delay=)``: a knob for tests and benchmarks).
    """

    def __init__(self, service, *, delay: float = 0.0):
        super().__init__(service)
        self.worker = JointPassWorker(delay=delay)
        self.asked: dict = {}  # run -> draws per chain of the last pass submitted
        self.first: dict = {}  # run -> {chain: first store position} the last pass submitted reads
        self.window_only: dict = {}  # run -> True when that pass covers only the kept window (tail)

    def final(self) -> None:
        """Before the final snapshot of a clean stop (the service has ingested what is there): run a
        joint-MCSE pass over every run's final draws (waiting at most ``FINAL_PASS_WAIT`` seconds in all)."""
        deadline = time.time() + FINAL_PASS_WAIT
        self.worker.wait(max(0.0, deadline - time.time()))
        self.collect()
        for state in list(self.runs.values()):
            scorer = state.scorer
            if not isinstance(scorer, RUN_SCORERS) or scorer.draws == 0 or state.aside_reason is not None:
                continue
            lengths = self.service.chain_lengths(state)
            per_chain = min(lengths.values()) if lengths else 0
            if per_chain != state.r_eff_per_chain:
                self.start(state, per_chain, scorer.r_eff(), force=True)
        self.worker.wait(max(0.0, deadline - time.time()))
        self.collect()


    def collect(self) -> None:
        """Take the results of finished joint-MCSE passes into their runs."""
        for result in self.worker.results():
            state = self.runs.get(result.run)
            if state is None:
                continue
            if result.error:
                self.event("warning", "pass_failed", f"run '{result.run}': the joint-MCSE pass over "
                           f"{result.per_chain} draws per chain failed: {result.error}", run=result.run)
                continue
            if result.joint_mcse is None:
                continue
            # a subsampled run's MCSE comes from its scorer (the per-draw influence of the whole
            # difference estimator, docs/numerics.md); a pass over its m stored columns alone
            # would leave out the other n - m observations and the cancellation inside d_j
            if not isinstance(state.scorer, RunSubsampledScorer):
                state.joint_mcse = result.joint_mcse
            state.r_eff_per_chain = result.per_chain
            state.joint_ratio = None  # measured against the streaming MCSE at the next snapshot

    def start(self, state: RunState, per_chain: int, r_eff, force: bool) -> None:
        """Submit a joint-MCSE pass over the committed draws when the run grew enough since the last
        (or went quiet); never waits for it.  A subsampled run needs none: its MCSE comes from the
        per-draw influence its scorer streams (chainvigil.estimators.subsample)."""
        if isinstance(state.scorer, RunSubsampledScorer):
            return
        asked = self.asked.get(state.name, 0)
        grown = per_chain >= (1 + R_EFF_REFRESH_GROWTH) * max(asked, 1)
        if per_chain < 4 or not (grown or (force and per_chain != asked)) or self.worker.busy(state.name):
            return
        chains = sorted(self.store.chains(state.name))
        first = {c: self.ingest.warmup_counts(state).get(c, 0) for c in chains}
        # Draws not yet committed may be in the view: if a failure cuts the store back, the same draws
        # are read again from the same files, and a pass that read a cut chunk gets NaN (no result).
        stop = per_chain
        window_pass = False
        if self.scorers.keep_draws == "tail" and self.scorers.retained(state):
            # the last `keep_window` draws that every chain still holds: a pass over them never holds
            # back the drops a checkpoint allows for long (they are below its view)
            held = min(first[c] + per_chain - max(first[c], self.store.kept_from(state.name, c)) for c in chains)
            stop = min(held, self.scorers.keep_window) if self.scorers.keep_window >= 4 else held
            if stop < 4 or (stop == per_chain and stop == state.r_eff_per_chain):
                return
            first = {c: first[c] + per_chain - stop for c in chains}
            window_pass = stop < per_chain
        elif self.scorers.dropped(state):
            return  # pruned, or --keep-draws none: the last pass stands
        elif stop == state.r_eff_per_chain:
            return
        elif self.scorers.keep_draws == "none" and self.scorers.drop_pending(state.name):
            return  # a pass from the first draws would hold back the drop a checkpoint allows
        view = self.store.frozen_view(state.name, chains, stop, first=first)
        if self.worker.submit(state.name, stop, view, chains, r_eff, state.n):
            self.asked[state.name] = per_chain
            self.first[state.name] = first
            self.window_only[state.name] = window_pass

    @staticmethod
    def apply(state: RunState, scores, per_chain: int):
        """loo.mcse as the joint MCSE (docs/numerics.md): exact when the last store pass saw these
        draws, else the joint/independent ratio of that pass applied to the streaming value."""
        independent = scores.loo.get("mcse_independent")
        if state.joint_mcse is None or independent is None or not math.isfinite(independent):
            return
        if state.joint_ratio is None:
            # first snapshot since the pass; both MCSEs fall as 1/sqrt(draws)
            scaled = state.joint_mcse * math.sqrt(state.r_eff_per_chain / per_chain) if per_chain else math.nan
            if independent > 0 and math.isfinite(scaled):
                state.joint_ratio = scaled / independent
        if state.r_eff_per_chain == per_chain:
            scores.use_joint_mcse(state.joint_mcse)
        elif state.joint_ratio is not None:
            scores.use_joint_mcse(ratio=state.joint_ratio)

