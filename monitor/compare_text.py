"""Comparisons of runs on the same data set, as records and as text: ``chainvigil compare``, the HTML
report and the headless service's change lines.

The figures come from the history's ``comparisons`` table (one round per comparison pass, written by
the service with :func:`chainvigil.estimators.compare.compare_runs`): per run ``elpd``, ``delta``
(elpd − best elpd), ``se_delta``, ``mcse_delta``, stacking ``weight``, ``caution`` and ``may_flip``.
Against a chosen run instead of the best, for runs b and reference r (Vehtari, Gelman & Gabry 2017,
Sec. 5.2):

    delta_b      = elpd_b − elpd_r                      (signed: negative = b predicts worse)
    se_delta_b   = sqrt(n · var_i(e_b,i − e_r,i))       (from the pointwise values the round used;
                                                         null when those values are no longer kept)
    mcse_delta_b = sqrt(MCSE_b² + MCSE_r²)              (each run's snapshot at the round's time)
    could_swap   = |delta_b| < 2 · mcse_delta_b
    caution      = |delta_b| < 4 or n < 100             (SE(Δ) likely too optimistic; Sivula et al.)

Stacking weights do not depend on the reference and are shown as stored.
"""
from __future__ import annotations

import math
import time as _time

import numpy as np

from chainvigil.estimators.compare import CAUTION_DELTA, CAUTION_N

__all__ = ["comparison_records", "comparison_text", "comparison_change_lines", "local_time"]


def local_time(t: float) -> str:
    return _time.strftime("%Y-%m-%d %H:%M:%S", _time.localtime(t))


def _num(value):
    return None if value is None or (isinstance(value, float) and not math.isfinite(value)) else value


def _by_dataset(rows: list[dict]) -> dict[str, list[dict]]:
    groups: dict[str, list[dict]] = {}
    for row in rows:
        groups.setdefault(row["dataset"], []).append(row)
    for members in groups.values():
        members.sort(key=lambda r: (r["rank"] if r["rank"] is not None else math.inf, r["run"]))
    return groups


def _snapshot_at(history, run: str, when: float) -> dict | None:
    """The run's last snapshot written at or before ``when``."""
    found = None
    for snap in history.snapshots(run=run):
        if snap["time"] is not None and snap["time"] <= when + 1e-9:
            found = snap
    return found


def _pointwise_at(history, run: str, snap: dict | None, elpd: float | None) -> np.ndarray | None:
    """The pointwise PSIS-LOO values behind a comparison row, or None when they are not kept.

    They are taken from the run's snapshot at the round's time; they are the round's values only if
    they add up to the round's elpd (older snapshots keep thinned pointwise values only).
    """
    if snap is None or elpd is None:
        return None
    rows = history.pointwise(run, snap["id"])
    values = np.array([np.nan if r["elpd_loo"] is None else r["elpd_loo"] for r in rows], dtype=float)
    if values.size == 0 or not np.all(np.isfinite(values)):
        return None
    if abs(values.sum() - elpd) > 1e-9 * max(1.0, abs(elpd)):
        return None
    return values


def _against_best(members: list[dict]) -> list[dict]:
    return [{"run": r["run"], "rank": r["rank"], "elpd": _num(r["elpd"]), "delta": _num(r["delta"]),
             "se_delta": _num(r["se_delta"]), "mcse_delta": _num(r["mcse_delta"]),
             "weight": _num(r["weight"]), "could_swap": bool(r["may_flip"]), "caution": bool(r["caution"])}
            for r in members]


def _against_run(history, members: list[dict], ref: str) -> list[dict]:
    when = members[0]["time"]
    by_run = {r["run"]: r for r in members}
    snaps = {r["run"]: _snapshot_at(history, r["run"], when) for r in members}
    ref_row = by_run[ref]
    ref_points = _pointwise_at(history, ref, snaps[ref], ref_row["elpd"])
    ref_mcse = snaps[ref]["loo_mcse"] if snaps[ref] else None
    out = []
    for r in members:
        rec = {"run": r["run"], "rank": r["rank"], "elpd": _num(r["elpd"]), "weight": _num(r["weight"])}
        if r["run"] == ref:
            rec.update(delta=0.0, se_delta=0.0, mcse_delta=0.0, could_swap=False, caution=False)
            out.append(rec)
            continue
        delta = None if r["elpd"] is None or ref_row["elpd"] is None else r["elpd"] - ref_row["elpd"]
        points = _pointwise_at(history, r["run"], snaps[r["run"]], r["elpd"])
        se = None
        if points is not None and ref_points is not None and points.size == ref_points.size and points.size > 1:
            se = float(math.sqrt(points.size * np.var(points - ref_points, ddof=1)))
        mcse_b = snaps[r["run"]]["loo_mcse"] if snaps[r["run"]] else None
        mcse = None if mcse_b is None or ref_mcse is None else float(math.hypot(mcse_b, ref_mcse))
        n = history.run(r["run"]) or {}
        n_obs = n.get("n_obs") or (points.size if points is not None else None)
        rec.update(delta=_num(delta), se_delta=_num(se), mcse_delta=_num(mcse),
                   could_swap=bool(delta is not None and mcse is not None and abs(delta) < 2 * mcse),
                   caution=bool(delta is not None and (abs(delta) < CAUTION_DELTA
                                                        or (n_obs is not None and n_obs < CAUTION_N))))
        out.append(rec)
    return out


def comparison_records(history, *, at_time: float | None = None, against: str | None = None) -> list[dict]:
    """Per data set, the latest comparison round at or before ``at_time`` (default: the newest).

    ``history`` is an open history (read API); ``against`` names a run to measure Δelpd against in
    the data set that holds it (the others, and every data set without it, are measured against
    their best run). Returns a list, by data set name, of ``{"dataset", "round", "time", "against",
    "against_best", "runs": [{"run", "rank", "elpd", "delta", "se_delta", "mcse_delta", "weight",
    "could_swap", "caution"}]}`` with runs best first. Raises ``LookupError`` when ``against``
    names no compared run.
    """
    groups = _by_dataset(history.comparisons(at_time=at_time))
    if against is not None and not any(r["run"] == against for m in groups.values() for r in m):
        raise LookupError(against)
    out = []
    for dataset, members in sorted(groups.items(), key=lambda kv: str(kv[0])):
        names = [r["run"] for r in members]
        chosen = against if against in names and against != names[0] else None
        runs = _against_run(history, members, chosen) if chosen else _against_best(members)
        out.append({"dataset": dataset, "round": members[0]["round"], "time": members[0]["time"],
                    "against": chosen or names[0], "against_best": chosen is None, "runs": runs})
    return out


def _f(value, spec: str) -> str:
    return "—" if value is None else format(value, spec)


def comparison_text(records: list[dict]) -> list[str]:
    """Lines for ``chainvigil compare``: per data set a heading, then one line per pair.

    Example::

        data set 'tarns', compared 2026-12-03 08:10:04 (round 41): 3 runs, Δ against the best, tarns-robust
          tarns-robust vs tarns-plain: Δelpd -14.20 (SE(Δ) 5.31, MCSE(Δ) 0.061); weights 0.92 / 0.08; order holds
    """
    lines = []
    for rec in records:
        how = (f"Δ against the best, {rec['against']}" if rec["against_best"]
               else f"Δ against the chosen run {rec['against']}")
        lines.append(f"data set '{rec['dataset']}', compared {local_time(rec['time'])} (round {rec['round']}): "
                     f"{len(rec['runs'])} runs, {how}")
        ref = next(r for r in rec["runs"] if r["run"] == rec["against"])
        for r in rec["runs"]:
            if r["run"] == rec["against"]:
                continue
            status = "could swap with more draws" if r["could_swap"] else "order holds"
            if r["delta"] is not None and r["delta"] > 0:
                lead = f"{r['run']} ahead"
            else:
                lead = f"{r['run']} behind"
            line = (f"  {rec['against']} vs {r['run']}: Δelpd {_f(r['delta'], '+.2f')} ({lead}; "
                    f"SE(Δ) {_f(r['se_delta'], '.2f')}, MCSE(Δ) {_f(r['mcse_delta'], '.3f')}); "
                    f"weights {_f(ref['weight'], '.2f')} / {_f(r['weight'], '.2f')}; {status}")
            if r["caution"]:
                line += "; SE(Δ) likely too small (|Δ| < 4 or n < 100)"
            lines.append(line)
    return lines


def comparison_change_lines(previous_rows: list[dict], current_rows: list[dict]) -> list[str]:
    """Lines telling what changed between two comparison passes, for the headless service.

    Both arguments are rows of the history's ``comparisons`` table (as ``History.comparisons()``
    returns them: ``dataset, run, rank, delta, mcse_delta, may_flip``, any number of data sets). A
    line is made, per data set, when the order of its runs differs from the previous pass (or it is
    compared for the first time), and per run other than the best when its could-swap status
    (``may_flip``: |Δ| < 2·MCSE(Δ) against the best) turned on or off. Nothing changed: an empty list.
    The service prints them as they are (after its clock, like its other lines).
    """
    before = _by_dataset(list(previous_rows or []))
    lines = []
    for dataset, members in sorted(_by_dataset(list(current_rows or [])).items(), key=lambda kv: str(kv[0])):
        order = [r["run"] for r in members]
        old = before.get(dataset)
        if old is None:
            lines.append(f"compare '{dataset}': order {' > '.join(order)}")
            continue
        old_order = [r["run"] for r in old]
        if order != old_order:
            lines.append(f"compare '{dataset}': order now {' > '.join(order)} (was {' > '.join(old_order)})")
        was = {r["run"]: bool(r["may_flip"]) for r in old}
        best = order[0]
        for r in members[1:]:  # the best run is the one the others could swap with
            if r["run"] not in was or bool(r["may_flip"]) == was[r["run"]]:
                continue
            figures = f"Δ {_f(_num(r['delta']), '+.2f')}, 2·MCSE(Δ) {_f(_num(r['mcse_delta']) and 2 * r['mcse_delta'], '.2f')}"
            if r["may_flip"]:
                lines.append(f"compare '{dataset}': {r['run']} could now swap with {best} ({figures}); "
                             "more draws may reorder them")
            else:
                lines.append(f"compare '{dataset}': {r['run']} no longer could swap with {best} ({figures})")
    return lines
