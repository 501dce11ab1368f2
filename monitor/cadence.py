"""When a run's snapshot is due, and what a run is doing (growing, paused, finished).

One :class:`SnapshotCadence` per service (``Service.cadence``) owns:

* the interval between a run's snapshots: ``every``, stretched while the run stays unchanged
  (:meth:`SnapshotCadence.interval`);
* :meth:`SnapshotCadence.due` (a run with new draws whose interval passed, a change growing <->
  paused at once, a run whose refits changed) and :meth:`SnapshotCadence.stale` (what a forced pass
  snapshots: new draws, or a finished joint-MCSE pass over exactly the current draws);
* a run's activity (:meth:`SnapshotCadence.activity`, the verdict's ``activity`` and the run
  state's source) and the run state following it between snapshots
  (:meth:`SnapshotCadence.follow_activity`).
"""
from __future__ import annotations

import time

from chainvigil.ingest import RunState
from chainvigil.rules import run_state
from chainvigil.service_part import ServicePart

__all__ = ["SnapshotCadence", "STRETCH_AFTER", "STRETCH_MAX", "FINISHED_SECONDS"]

# Snapshot cadence that stretches as a run settles: once a run's state and the verdict's pass/fail
# have not changed for STRETCH_AFTER seconds, the interval between its snapshots grows linearly with
# that stable time (stable time / STRETCH_AFTER x every), up to STRETCH_MAX seconds.  A change of
# state, of pass/fail or of activity (growing/paused) snapshots at the normal cadence again at once.
STRETCH_AFTER = 600.0
STRETCH_MAX = 60.0
# A run with no new draws for this long counts as finished (every chain stopped); one whose stop
# signal was written counts as finished as soon as it is quiet.  Quiet: no new draws for
# max(2 x every, 2 s) ("paused").  A run's state follows its activity without a new snapshot.
FINISHED_SECONDS = 1800.0


class SnapshotCadence(ServicePart):
    """The snapshot schedule and the activity of each run (module docstring).

    Parameters
    ----------
    service : the ``chainvigil.service.Service`` (its ``every``, history, refits).
    stretch, stretch_after : as the ``Service`` parameters of the same names.
    """

    def __init__(self, service, *, stretch: bool = True, stretch_after: float = STRETCH_AFTER):
        super().__init__(service)
        self.stretch = stretch
        self.stretch_after = float(stretch_after)
        self._stable: dict = {}  # run -> (what the cadence watches, since when it is unchanged)
        self._started = time.time()

    @property
    def every(self) -> float:
        return self.service.every

    def interval(self, state: RunState, now: float) -> float:
        """Seconds between snapshots of this run: ``every``, stretched while it stays unchanged."""
        if not self.stretch:
            return self.every
        watched, since = self._stable.get(state.name, (None, now))
        stable = now - since
        if stable < self.stretch_after:
            return self.every
        return max(self.every, min(STRETCH_MAX, self.every * stable / self.stretch_after))

    def quiet(self, state: RunState, now: float) -> bool:
        return now - max(state.last_growth, self._started) > max(2 * self.every, 2.0)

    def activity(self, state: RunState, now: float) -> str:
        """growing / paused / finished (the verdict's activity and the run state's source)."""
        if not self.quiet(state, now):
            return "growing"
        idle = now - max(state.last_growth, self._started)
        return "finished" if idle > FINISHED_SECONDS or state.signalled else "paused"

    def follow_activity(self, state: RunState, now: float) -> None:
        """A run that was not scored this pass: its state follows its activity (paused, finished)."""
        verdict = state.last_verdict
        if not isinstance(verdict, dict) or state.aside_reason is not None or state.scorer is None:
            return
        activity = self.activity(state, now)
        if verdict.get("activity", "growing") == activity:
            return
        state.last_verdict = {**verdict, "activity": activity}
        self.history.set_run_state(state.name, run_state(state.last_verdict, state.k_max))

    def due(self, state: RunState, now: float) -> bool:
        """Is the run's snapshot due now (new draws and its interval passed, or growing <-> paused)?"""
        if state.scorer is None or state.scorer.draws == 0 or state.aside_reason is not None:
            return False
        if state.scorer.draws == state.draws_at_snapshot:
            return self.refits.wants_snapshot(state) and now - state.last_snapshot >= self.every
        watched, _ = self._stable.get(state.name, (None, now))
        if watched is not None and watched[-1] != self.quiet(state, now):
            return True  # growing <-> paused: at once
        return now - state.last_snapshot >= self.interval(state, now)

    def stale(self, state: RunState) -> bool:
        """New draws since the last snapshot, or a finished joint-MCSE pass over exactly the current
        draws that the last snapshot did not use yet; on the final pass of a clean stop also a last
        snapshot that served some PSIS tails from a lagged fit (the kept last row is exact)."""
        if state.scorer is None or state.scorer.draws == 0 or state.aside_reason is not None:
            return False
        if state.scorer.draws != state.draws_at_snapshot or self.refits.wants_snapshot(state):
            return True
        if self.service.final_pass and getattr(state.scorer, "lagged_rows", 0):
            return True
        lengths = self.service.chain_lengths(state)
        per_chain = min(lengths.values()) if lengths else 0
        return state.r_eff_per_chain == per_chain and state.snapshot_r_eff_per_chain != per_chain

    def watch(self, state: RunState, watched: tuple, now: float) -> None:
        """After a snapshot: what the cadence watches (run state, pass/fail, quiet); its stable time
        starts again when it changed."""
        if self._stable.get(state.name, (None,))[0] != watched:
            self._stable[state.name] = (watched, now)
