"""The mixing schedule: when a run's R-hat, ESS and MCSE of the parameters are recomputed, and the
figures in force in between (docs/verdict.md, docs/numerics.md).

Mixing reads every parameter draw and ranks them, a cost that grows with the run. One
:class:`MixingSchedule` per service (``Service.mixing``) recomputes a run's figures
(:meth:`MixingSchedule.figures`) at every snapshot while the run has fewer than
``MIXING_EVERY_SNAPSHOT_BELOW`` draws per chain, then each time draws per chain have grown by
``MIXING_GROWTH`` since the figures in force, when the run goes quiet and on the final snapshot; in
between a snapshot carries the figures in force and records which draws per chain they cover
(``snapshots.mixing_draws``). Amortised, the cost per snapshot stays flat. After a restart the
figures in force are taken from the latest snapshot (:meth:`MixingSchedule.restore`). The figures
are kept per run in ``RunState.mixing_cache``.
"""
from __future__ import annotations

import numpy as np

from chainvigil.estimators.mixing import mixing_summary
from chainvigil.ingest import RunState
from chainvigil.service_part import ServicePart

__all__ = ["MixingSchedule", "MIXING_EVERY_SNAPSHOT_BELOW", "MIXING_GROWTH"]

MIXING_EVERY_SNAPSHOT_BELOW = 128
MIXING_GROWTH = 0.05


def _shown_names(names, limit: int = 6) -> str:
    names = list(names or [])
    shown = ", ".join(repr(n) for n in names[:limit]) + (", ..." if len(names) > limit else "")
    return f"[{shown}]"


class MixingSchedule(ServicePart):
    """R-hat, ESS and MCSE of each run's parameters on their schedule (module docstring).

    Parameters
    ----------
    service : the ``chainvigil.service.Service`` (its store, history, ingest and events).
    """

    def __init__(self, service):
        super().__init__(service)

    def restore(self, state: RunState, last: dict) -> None:
        """The mixing figures in force at the latest snapshot (its row and mixing rows), so the first
        snapshot after a restart does not reread every parameter draw unless the schedule says so."""
        covered = last.get("mixing_draws")
        if not covered or state.scorer is None:
            return
        names, chains, _ = self.ingest.mixing_chains(state)
        rows = self.history.mixing(last["id"])
        if not names or [r["param"] for r in rows] != list(names):
            return
        keys = ("mean", "mcse", "rhat", "ess_bulk", "ess_tail", "sd", "q05", "q95", "chain_means", "chain_sds")
        figures = {"rhat_max": last.get("rhat_max"), "ess_bulk_min": last.get("ess_bulk_min"),
                   "ess_tail_min": last.get("ess_tail_min"),
                   "params": {r["param"]: {k: r.get(k) for k in keys} for r in rows},
                   "draws_per_chain": int(covered)}
        state.mixing_cache = (int(covered), (tuple(names), tuple(chains)), figures)


    def figures(self, state: RunState, per_chain: int, *, refresh: bool = False):
        """R-hat, ESS and MCSE of the parameters (docs/numerics.md) over the chains that share the
        run's parameters; a chain with other parameters, and a parameter with non-finite draws, is
        left out with an event (its log-likelihood is scored all the same).

        Recomputed on the schedule of ``MIXING_GROWTH`` (or when ``refresh``); otherwise the figures
        in force are returned.  ``draws_per_chain`` in the result says which draws they cover."""
        names, chains, left_out = self.ingest.mixing_chains(state)
        key = (tuple(names or ()), tuple(chains))
        cached = state.mixing_cache
        if (cached is not None and not refresh and cached[1] == key
                and per_chain >= MIXING_EVERY_SNAPSHOT_BELOW
                and cached[0] <= per_chain < (1 + MIXING_GROWTH) * cached[0]):
            return cached[2]
        result = self._compute(state, per_chain, names, chains, left_out)
        if result is not None:
            result["draws_per_chain"] = int(per_chain)
        state.mixing_cache = (int(per_chain), key, result)
        return result

    def _compute(self, state: RunState, per_chain: int, names, chains, left_out):
        for chain, theirs in left_out:
            self.event("warning", "params_differ",
                       f"run '{state.name}': chain '{chain}' has parameters {_shown_names(theirs)}, not "
                       f"{_shown_names(names)} as its first chain; it is left out of R-hat and ESS "
                       "(its log-likelihood is scored)", run=state.name, file=state.chains[chain].path)
        if not names or per_chain < 4 or not chains:
            return None
        warmup = self.ingest.warmup_counts(state)
        draws = np.stack([self.store.read_params(state.name, c,
                                                 draws=slice(warmup.get(c, 0), warmup.get(c, 0) + per_chain))
                          for c in chains])
        finite = np.all(np.isfinite(draws), axis=(0, 1))
        if not finite.all():
            bad = [n for n, ok in zip(names, finite) if not ok]
            self.event("warning", "not_mixed",
                       f"run '{state.name}': parameter(s) {_shown_names(bad)} have non-finite draws; "
                       "left out of R-hat and ESS", run=state.name)
            draws, names = draws[:, :, finite], [n for n, ok in zip(names, finite) if ok]
            if not names:
                return None
        return mixing_summary(draws, names)

