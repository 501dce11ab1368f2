"""The comparison round of a pass: the runs of each data set compared from their in-memory
pointwise elpd_loo and MCSE (docs/architecture.md, step 5 of a chunk's path).

One :class:`Comparisons` per service (``Service.comparisons``) groups the runs by data set (a refit
is part of its run, a subsampled run carries no pointwise values and is not compared), computes the
round (``chainvigil.estimators.compare``), writes it to the history, prints a headless line when the
order or the could-swap status of a data set changed since its last round (kept in memory, not read
back from the history), and returns the rows this pass's verdicts judge.
"""
from __future__ import annotations

import numpy as np

from chainvigil.compare_text import comparison_change_lines
from chainvigil.estimators.compare import compare_runs, pairwise_differences
from chainvigil.reports import clock, escape_text
from chainvigil.service_part import ServicePart

__all__ = ["Comparisons"]


class Comparisons(ServicePart):
    """This pass's comparison of the runs of each data set (module docstring).

    Parameters
    ----------
    service : the ``chainvigil.service.Service`` (its runs, refits, history, events and report).
    """

    def __init__(self, service):
        super().__init__(service)
        self._compared: dict = {}  # the last comparison round of each data set, for the change lines

    def compare(self) -> dict:
        """Compare, per data set, every run with in-memory pointwise values; write one round per data
        set and return ``{dataset: rows}`` (best first) for this pass's verdicts."""
        groups: dict = {}
        for state in self.runs.values():
            if self.refits.is_refit(state):
                continue  # a refit is part of its run, not a model of its own
            dataset = state.info.get("dataset")
            values = state.pointwise_loo
            if dataset and state.n and values is not None and values.shape == (state.n,):
                groups.setdefault((dataset, state.n), []).append(state)
        out = {}
        for (dataset, n), members in sorted(groups.items()):
            pointwise = {s.name: s.pointwise_loo for s in members
                         if np.all(np.isfinite(s.pointwise_loo)) and s.loo_mcse is not None}
            if len(pointwise) < 2:
                continue
            mcse = {s.name: s.loo_mcse for s in members if s.name in pointwise}
            try:
                rows = compare_runs(pointwise, mcse)
                pairs = pairwise_differences(pointwise, mcse)
            except ValueError as err:
                self.event("warning", "not_compared", f"data set '{dataset}': {err}")
                continue
            self.history.add_comparison(dataset, rows, pairs=pairs)
            out[dataset] = rows
        self._report_changes(out)
        return out

    def _report_changes(self, current: dict):
        """One headless line per data set whose order or could-swap status changed since the last
        comparison of that data set (kept in memory, not read back from the history)."""
        def flat(rounds):
            return [{**row, "dataset": dataset, "rank": i} for dataset, rows in rounds.items()
                    for i, row in enumerate(rows)]
        previous = {d: self._compared[d] for d in current if d in self._compared}
        for line in comparison_change_lines(flat(previous), flat(current)):
            self.report(f"{clock()} {escape_text(line)}")
        self._compared.update(current)
