"""The base of the service's parts (``chainvigil.scorer_lifecycle``, ``chainvigil.joint_passes``,
``chainvigil.mixing_schedule``, ``chainvigil.cadence``, ``chainvigil.comparisons``).

Each part holds the service and reads the pieces it shares through it every time, never a copy:
a reopened state folder replaces the service's store and history (after a failure of the state
folder), and every part must then see the new ones.
"""
from __future__ import annotations

__all__ = ["ServicePart"]


class ServicePart:
    """A part of one service; ``service`` is the ``chainvigil.service.Service`` it belongs to."""

    def __init__(self, service):
        self.service = service

    @property
    def store(self):
        return self.service.store

    @property
    def history(self):
        return self.service.history

    @property
    def ingest(self):
        return self.service.ingest

    @property
    def refits(self):
        return self.service.refits

    @property
    def runs(self):
        return self.service.runs

    @property
    def state_dir(self):
        return self.service.state_dir

    @property
    def scorers(self):
        return self.service.scorers

    def event(self, *args, **kwargs):
        self.service.event(*args, **kwargs)

    def report(self, line: str):
        self.service.report(line)
