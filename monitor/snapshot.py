"""Snapshot building: pure functions from scores, mixing and verdict to one history row.

No I/O here.  The service scores a run (``StreamingScorer.scores`` plus ``mixing_summary``),
evaluates the verdict, and these functions turn the resulting ``Scores.to_dict()`` into

* :func:`snapshot_row`: the ``snapshots`` row, with exactly the keys of
  ``chainvigil.storage.history.SNAPSHOT_COLUMNS`` (checked by :func:`snapshot_row` itself),
* :func:`pointwise_values`: the per-observation arrays for ``pointwise_latest``/``_history``,
* :func:`mixing_rows`: the per-parameter rows for ``mixing``,
* :func:`trail_point`: what the verdict's stability and projections need of an earlier snapshot,
* :func:`draw_rate`: draws per chain per second over a recent window of (time, draws per chain).
"""
from __future__ import annotations

from collections import deque

import numpy as np

from chainvigil.rules import finite_or_none
from chainvigil.storage.history import SNAPSHOT_COLUMNS, SNAPSHOT_FIELDS

__all__ = ["snapshot_row", "pointwise_values", "mixing_rows", "trail_point", "draw_rate"]

# Snapshot columns that are not read from the scores' JSON shape (they come from the service).
_FROM_SERVICE = {"time", "draws_per_chain", "draw_rate", "r_eff_mean", "enough", "verdict", "r_eff_source",
                 "joint_pass", "loo_lagged"}


def _at(data: dict, path: tuple):
    value = data
    for key in path:
        if not isinstance(value, dict):
            return None
        value = value.get(key)
    return value


def snapshot_row(data: dict, now: float, per_chain: int, rate, r_eff, *, r_eff_source: str | None = None,
                 joint_pass: int | None = None, loo_lagged: int | None = None) -> dict:
    """The ``snapshots`` row of one score update.

    data      ``Scores.to_dict()`` with ``verdict`` set (the keys of ``score --json``)
    now       unix time of the snapshot
    per_chain draws of the shortest chain
    rate      draws per chain per second (None when unknown)
    r_eff     the relative efficiencies PSIS-LOO used, (n,) or a scalar or None (= 1)
    r_eff_source  which r_eff that was: "streaming", or None (no streaming r_eff: r_eff = 1 was used)
    joint_pass    draws per chain of the store pass whose joint MCSE (ratio) loo.mcse uses, or None
    loo_lagged    observations PSIS-LOO served from a lagged tail fit (``StreamingScorer.lagged_rows``),
                  or None for a scorer without a tail cache

    Every value is taken from ``data`` at the column's JSON path (``SNAPSHOT_COLUMNS``), so the row,
    ``history --json`` and ``score --json`` agree by construction; non-finite numbers become None.
    """
    verdict = data.get("verdict") or {}
    r = np.asarray(r_eff if r_eff is not None else 1.0, dtype=float)
    row = {"time": now, "draws_per_chain": int(per_chain), "draw_rate": finite_or_none(rate),
           "r_eff_mean": finite_or_none(np.nanmean(r)) if np.any(np.isfinite(r)) else None,
           "enough": int(bool(verdict.get("enough"))), "verdict": verdict,
           "r_eff_source": r_eff_source, "joint_pass": None if joint_pass is None else int(joint_pass),
           "loo_lagged": None if loo_lagged is None else int(loo_lagged)}
    for column in SNAPSHOT_COLUMNS:
        if column.name in _FROM_SERVICE:
            continue
        value = _at(data, column.json)
        if column.sql == "TEXT":
            row[column.name] = value if isinstance(value, str) else None
        else:
            row[column.name] = (int(value) if column.sql == "INTEGER" and value is not None
                                else finite_or_none(value))
    assert tuple(sorted(row)) == tuple(sorted(SNAPSHOT_FIELDS)), "snapshot row and column spec differ"
    return row


def pointwise_values(data: dict, labels, only=None) -> dict:
    """Per-observation arrays for the history: ``elpd_loo``, ``elpd_waic``, ``k_hat``, ``labels``
    and ``loo_source`` (where each elpd_loo comes from: "psis" | "pending" | "exact" | "kfold"; None
    when the scores carry no ``pointwise.loo_source``).

    ``only``: the 0-based observations to keep (a subsampled run: its sampled observations, the only
    ones with an exact PSIS-LOO value and a k-hat); then ``obs`` holds them and every array has
    ``len(only)`` entries.  None keeps all n (``obs`` absent: 0..n-1)."""
    out = {
        "elpd_loo": np.asarray(data["pointwise"]["loo"], dtype=float),
        "elpd_waic": np.asarray(data["pointwise"]["waic"], dtype=float),
        "k_hat": np.asarray(data["pareto_k"]["values"], dtype=float),
        "labels": labels,
        "loo_source": data["pointwise"].get("loo_source"),
    }
    if only is None:
        return out
    idx = np.asarray(only, dtype=np.int64)
    for key in ("elpd_loo", "elpd_waic", "k_hat"):
        out[key] = out[key][idx]
    for key in ("labels", "loo_source"):
        if out[key] is not None:
            out[key] = [out[key][i] for i in idx.tolist()]
    out["obs"] = idx
    return out


def mixing_rows(data: dict, more_draws: dict | None = None) -> list[dict]:
    """One row per parameter: the figures of ``mixing_summary`` (``param, mean, mcse, rhat, ess_bulk,
    ess_tail, sd, q05, q95, chain_means, chain_sds``) and, when given, ``more_draws`` (param -> draws
    per chain still needed, ``chainvigil.verdict.parameter_projections``)."""
    params = (data.get("mixing") or {}).get("params", {})
    rows = [{"param": name, **values} for name, values in params.items()]
    if more_draws is not None:
        for row in rows:
            row["more_draws"] = more_draws.get(row["param"])
    return rows


def trail_point(row: dict) -> dict:
    """What the verdict's stability and R-hat projections need from an earlier snapshot row."""
    point = {key: row.get(key) for key in ("draws_per_chain", "loo_elpd", "loo_mcse", "time", "rhat_max",
                                           "ess_bulk_min", "ess_tail_min")}
    verdict = row.get("verdict")
    point["passed"] = verdict.get("passed") if isinstance(verdict, dict) else None  # the stopping rule's streak
    return point


def draw_rate(window: deque) -> float | None:
    """Draws per chain per second between the oldest and newest (time, draws per chain) of ``window``."""
    if len(window) < 2:
        return None
    (t0, d0), (t1, d1) = window[0], window[-1]
    if t1 <= t0 or d1 <= d0:
        return None
    return (d1 - d0) / (t1 - t0)
