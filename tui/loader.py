"""Reads what the screen needs from the SQLite history (through ``History``'s read API only).

``Loader.load(request)`` returns a ``View``: a plain, immutable-by-convention bundle of everything
every panel shows for one run at one snapshot (the time cursor). The app calls it from a worker
thread; the SQLite connection lives in that thread.

Everything the screen knows comes from here: run states from ``runs.state``, goals from the checks of
the snapshot's stored verdict (each carries its ``target``). Rows of the history never change once
written, so the trails (pointwise values over the run, comparison rounds over the run) are cached.
The history is opened in ``_open`` only (one line to change when the read API gets its own class).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import Any

@dataclass(frozen=True)
class Request:
    """What the user is looking at: a run (None: the first one) and a snapshot seq (None: the latest)."""

    run: str | None = None
    seq: int | None = None


@dataclass
class View:
    runs: list[dict] = field(default_factory=list)  # runs rows, each with "latest" (snapshot or None)
    run: dict | None = None  # the selected run's row
    snapshots: list[dict] = field(default_factory=list)  # the run's snapshots up to the cursor
    snap: dict | None = None  # the snapshot under the cursor
    n_snapshots: int = 0  # all snapshots of the run
    at_latest: bool = True
    following: bool = True  # the request asked for "latest" (live follow)
    mixing: list[dict] = field(default_factory=list)
    pointwise: list[dict] = field(default_factory=list)
    pointwise_from: int | None = None  # seq of the snapshot the pointwise values belong to
    comparisons: list[dict] = field(default_factory=list)  # rows for the run's dataset (comparable)
    events: list[dict] = field(default_factory=list)  # recent events of the run, newest last
    chains: list[dict] = field(default_factory=list)  # the run's chains rows (committed draws, now)
    chain_names: list[str] = field(default_factory=list)  # the run's chains by name (any snapshot)
    # the pointwise values stored over the run up to the cursor: [(seq, draws, rows)], oldest first
    pointwise_trail: list[tuple[int, int, list[dict]]] = field(default_factory=list)
    # the comparison rounds seen at each snapshot up to the cursor: [(seq, time, rows)], oldest first
    comparison_trail: list[tuple[int, float, list[dict]]] = field(default_factory=list)
    # every stored pair (comparison_pairs rows) of the rounds shown: {round: [pair rows]}
    pairs_by_round: dict[int, list[dict]] = field(default_factory=dict)
    peer_pointwise: dict[str, list[dict]] = field(default_factory=dict)  # compared runs' pointwise
    mixing_trail: dict[str, list[dict]] = field(default_factory=dict)  # param -> its rows over the run
    marker: Any = None
    problem: str | None = None  # e.g. the history file is not there yet
    service: dict | None = None  # the service liveness row (heartbeat, stopped_at, crashed_at)
    request: Request | None = None  # what was asked for


def check(snap: dict | None, name: str) -> dict | None:
    """The check called ``name`` in the snapshot's stored verdict, or None."""
    verdict = (snap or {}).get("verdict")
    if isinstance(verdict, dict):
        for c in verdict.get("checks") or []:
            if c.get("name") == name:
                return c
    return None


def goal(snap: dict | None, name: str) -> float | None:
    """The ``target`` the stored verdict's check ``name`` carries (None when not stored)."""
    c = check(snap, name)
    t = c.get("target") if c else None
    return float(t) if isinstance(t, (int, float)) and not isinstance(t, bool) else None


def mcse_target(run: dict | None, snap: dict | None) -> float | None:
    """The MCSE(elpd_loo) goal: from the verdict check about MCSE, else the run's targets, else None."""
    if snap and isinstance(snap.get("verdict"), dict):
        for c in snap["verdict"].get("checks") or []:
            if "mcse" in str(c.get("name", "")).lower() and isinstance(c.get("target"), (int, float)):
                return float(c["target"])
    if run and isinstance(run.get("targets"), dict):
        for k, v in run["targets"].items():
            if "mcse" in k.lower() and isinstance(v, (int, float)):
                return float(v)
    return None


class Loader:
    """Opens the history read-only (when it exists) and assembles Views, caching snapshot rows."""

    def __init__(self, path: str | os.PathLike):
        self.path = os.fspath(path)
        self.history = None
        self._snaps: dict[str, list[dict]] = {}
        self._events: dict[str, list[dict]] = {}
        self._pointwise_at: dict[tuple[str, int], list[dict]] = {}
        self._rounds_at: dict[int, list[dict]] = {}
        self._mixing_at: dict[int, list[dict]] = {}
        self._pairs_at: dict[int, list[dict]] = {}

    def _open(self):
        if self.history is None and os.path.exists(self.path):
            from chainvigil.storage.history import HistoryReader

            self.history = HistoryReader(self.path)
        return self.history

    def marker(self):
        """Changes when the history is written to, and when the service stops counting as live (a
        stopped service writes nothing more, so its heartbeat growing old is a change of its own)."""
        h = self._open()
        if h is None:
            return None
        from .fmt import service_alive
        return (*h.change_marker(), service_alive(h.service()))

    def _snapshots(self, run: str) -> list[dict]:
        cached = self._snaps.setdefault(run, [])
        after = cached[-1]["id"] if cached else 0
        cached.extend(self.history.snapshots(run, after_id=after))
        return cached

    def _run_events(self, run: str) -> list[dict]:
        cached = self._events.setdefault(run, [])
        after = cached[-1]["id"] if cached else 0
        cached.extend(self.history.events(after_id=after, run=run))
        return cached

    def load(self, req: Request) -> View:
        h = self._open()
        if h is None:
            return View(problem=f"waiting for the history file {self.path}")
        marker = h.change_marker()
        runs = h.runs()
        for r in runs:
            r["latest"] = h.latest_snapshot(r["name"])
        view = View(runs=runs, marker=marker, request=req, service=h.service())
        if not runs:
            view.problem = "no runs in the history yet"
            return view
        names = [r["name"] for r in runs]
        name = req.run if req.run in names else names[0]
        run = runs[names.index(name)]
        view.run = run
        snaps = self._snapshots(name)
        view.n_snapshots = len(snaps)
        view.following = req.seq is None
        if not snaps:
            return view
        if req.seq is None:
            idx = len(snaps) - 1
        else:
            idx = next((i for i, s in enumerate(snaps) if s["seq"] >= req.seq), len(snaps) - 1)
            if snaps[idx]["seq"] > req.seq and idx > 0:
                idx -= 1
        snap = snaps[idx]
        view.snapshots = snaps[: idx + 1]
        view.snap = snap
        view.at_latest = idx == len(snaps) - 1
        view.mixing = h.mixing(snap["id"])
        pw = h.pointwise(name, snapshot_id=None if view.at_latest else snap["id"])
        view.pointwise = pw
        from_id = _pointwise_source(pw)
        if from_id is None and view.at_latest:
            from_id = snap["id"]
        by_id = {s["id"]: s["seq"] for s in snaps}
        view.pointwise_from = by_id.get(from_id)
        rows = h.comparisons(dataset=run.get("dataset"), at_time=None if view.at_latest else snap["time"])
        view.comparisons = comparable_rows(rows, run, runs)
        view.events = [e for e in self._run_events(name)
                       if e.get("level") in ("warning", "error")
                       and (view.at_latest or (e.get("time") or 0) <= snap["time"])][-3:]
        if not view.at_latest:  # the runs list too shows each run as it was at the cursor time
            for r in runs:
                then = [x for x in self._snapshots(r["name"]) if x["time"] <= snap["time"]]
                r["latest"] = then[-1] if then else None
                # the state stays the runs table's (the history keeps no state per snapshot)
        chains = h.chains(name)
        view.chains = chains if view.at_latest else []
        view.chain_names = [c["chain"] for c in chains]
        view.pointwise_trail = self._pointwise_trail(name, view.snapshots)
        view.mixing_trail = self._mixing_trail(view.snapshots, view.mixing)
        if view.comparisons:
            view.comparison_trail = self._comparison_trail(run["dataset"], view.snapshots, run, runs)
            for rows_of_round in [view.comparisons] + [r for _, _, r in view.comparison_trail]:
                rnd = rows_of_round[0].get("round")
                if rnd is not None and rnd not in view.pairs_by_round:
                    if rnd not in self._pairs_at:  # a round's rows never change once written
                        self._pairs_at[rnd] = h.comparison_pairs(rnd)
                    view.pairs_by_round[rnd] = self._pairs_at[rnd]
            for c in view.comparisons:
                peer = c["run"]
                if peer == name:
                    continue
                if view.at_latest:
                    view.peer_pointwise[peer] = h.pointwise(peer)
                else:
                    then = [x for x in self._snapshots(peer) if x["time"] <= snap["time"]]
                    view.peer_pointwise[peer] = h.pointwise(peer, snapshot_id=then[-1]["id"]) if then else []
        return view

    def _pointwise_trail(self, run: str, snaps: list[dict], most: int = 48):
        """The distinct stored pointwise sets up to the last of ``snaps`` (the history keeps a thinned
        set), each as (seq, total draws, rows) of the snapshot it belongs to; asked at no more than
        ``most`` snapshots spread over the run (plus the cursor's)."""
        if not snaps:
            return []
        by_id = {s["id"]: s for s in snaps}
        step = max(1, len(snaps) // most)
        asked = snaps[::step] + ([snaps[-1]] if (len(snaps) - 1) % step else [])
        newest = self._snaps.get(run, [{}])[-1].get("id")
        found: dict[int, list[dict]] = {}
        for s in asked:
            key = (run, s["id"])
            rows = self._pointwise_at.get(key)
            if rows is None:
                rows = self.history.pointwise(run, snapshot_id=s["id"])
                if s["id"] != newest:  # a later snapshot exists: what is stored for s is final
                    self._pointwise_at[key] = rows
            if rows and rows[0].get("snapshot_id") in by_id:
                found[rows[0]["snapshot_id"]] = rows
        return [(by_id[i]["seq"], by_id[i]["draws"], rows) for i, rows in sorted(found.items())]

    def _mixing_trail(self, snaps: list[dict], now: list[dict], most: int = 60) -> dict[str, list[dict]]:
        """Each parameter's mixing rows at up to ``most`` snapshots spread over the run, oldest first,
        ending with the cursor's."""
        step = max(1, len(snaps) // most)
        trail: dict[str, list[dict]] = {}
        for s in snaps[:-1][::step]:
            if s["id"] not in self._mixing_at:
                self._mixing_at[s["id"]] = self.history.mixing(s["id"])
            for m in self._mixing_at[s["id"]]:
                trail.setdefault(m["param"], []).append(m)
        for m in now:
            trail.setdefault(m["param"], []).append(m)
        return trail

    def _comparison_trail(self, dataset: str, snaps: list[dict], run: dict, runs: list[dict]):
        """The comparison round in force at each snapshot of the run (only rounds this run is in)."""
        trail, last_round = [], None
        step = max(1, len(snaps) // 60)
        newest = self._snaps.get(run["name"], [{}])[-1].get("id")
        for s in snaps[::step] + ([snaps[-1]] if (len(snaps) - 1) % step else []):
            rows = self._rounds_at.get(s["id"])
            if rows is None:
                rows = self.history.comparisons(dataset=dataset, at_time=s["time"])
                if s["id"] != newest:
                    self._rounds_at[s["id"]] = rows
            rows = comparable_rows(rows, run, runs)
            if rows and rows[0].get("round") != last_round:
                trail.append((s["seq"], s["time"], rows))
                last_round = rows[0].get("round")
        return trail


def _pointwise_source(rows: list[dict]) -> int | None:
    """The snapshot id the pointwise rows belong to (whatever key the history uses for it)."""
    for key in ("from_snapshot", "source_snapshot", "snapshot_id"):
        if rows and rows[0].get(key) is not None:
            return rows[0][key]
    return None


def comparable_rows(rows: list[dict], run: dict, runs: list[dict]) -> list[dict]:
    """Comparison rows that belong with ``run``: same dataset, same number of observations, and the
    run itself among them (else nothing to show). Sorted by rank."""
    if not run.get("dataset"):
        return []
    n_of = {r["name"]: r.get("n_obs") for r in runs}
    rows = [c for c in rows if c.get("dataset") == run["dataset"]
            and n_of.get(c.get("run")) == run.get("n_obs")]
    if len(rows) < 2 or run["name"] not in {c["run"] for c in rows}:
        return []
    return sorted(rows, key=lambda c: c.get("rank") or 0)
