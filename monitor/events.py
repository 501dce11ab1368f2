"""The service's event log: things worth telling the user, recorded in the history and reported.

``EventLog.event`` writes one row to the history's ``events`` table (when there is a history) and,
for warnings and errors, one escaped line through the report callable.  An identical problem
(same run, file, kind and message) is recorded once.  ``problems`` keeps every input problem seen,
for callers without a history (the one-shot ``score``; with a history nothing is kept in memory).
"""
from __future__ import annotations

from typing import Callable

from chainvigil.problems import InputProblem
from chainvigil.reports import problem_line


class EventLog:
    """Events of one service (or one one-shot read).

    Parameters
    ----------
    history : a ``HistoryWriter`` or None (nothing recorded, e.g. the one-shot ``score``).
    report : called with one line of text per warning or error (the headless output).
    """

    def __init__(self, history=None, report: Callable[[str], None] | None = None):
        self.history = history
        self.report = report or (lambda line: None)
        self.problems: list[InputProblem] = []
        self._seen: set = set()

    def event(self, level: str, kind: str, message: str, run: str | None = None, file=None,
              once: bool = True) -> None:
        """Record an event; repeated identical problems are recorded once (unless ``once=False``)."""
        key = (run, str(file) if file else None, kind, message)
        if once and key in self._seen:
            return
        self._seen.add(key)
        if self.history is not None:
            self.history.add_event(level, kind, message, run=run, file=str(file) if file else None)
        if level in ("warning", "error"):
            self.report(problem_line(run, message))

    def problem(self, problem: InputProblem, run: str | None, level: str = "warning",
                once: bool = True) -> None:
        """Record an input problem (file + what is wrong with it); ``once=False`` records it again
        even when the same problem was recorded before (e.g. once per change of run.json)."""
        if self.history is None:  # kept for callers without a history; the service has its events
            self.problems.append(problem)
        self.event(level, problem.kind, str(problem), run=run, file=problem.path, once=once)

    def forget(self, run: str) -> None:
        """Let the problems of ``run`` be recorded again (after it was set aside and retried)."""
        self._seen = {key for key in self._seen if key[0] != run}
