"""The verdict's indexed trail (``chainvigil.verdict.TrailIndex``): the verdict read through the index
equals the verdict read from the plain list, and a snapshot's verdict reads a bounded part of it,
however many points came before (the long-run cost of the service, docs/verdict.md).

The outside reference for the pooled ESS rate is its textbook formula, the weighted least-squares
slope through the origin Σ ESS_k / Σ S_k (a ratio estimator), summed here with ``math.fsum``."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from _tiers import examples
import chainvigil.verdict as verdicts
from chainvigil.verdict import Targets, TrailIndex, TrailPoint, evaluate
from test_bounded_trail import synthetic_run


def shuffled_a_little(rng, points):
    """A few neighbouring points swapped (a trail out of order: restored from an odd history)."""
    out = list(points)
    for _ in range(max(1, len(out) // 50)):
        i = int(rng.integers(0, max(1, len(out) - 1)))
        if i + 1 < len(out):
            out[i], out[i + 1] = out[i + 1], out[i]
    return out


@settings(max_examples=examples(15), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), steps=st.integers(5, 200), window=st.sampled_from([0.05, 0.5, 0.6]),
       pass_bias=st.sampled_from([0.0, 0.8]), disorder=st.booleans())
def test_the_indexed_trail_gives_the_verdict_of_the_plain_list(seed, steps, window, pass_bias, disorder):
    targets = Targets(stability_window=window)
    rng = np.random.default_rng(seed)
    index, plain = TrailIndex(), []
    run = list(synthetic_run(seed, steps, pass_bias=pass_bias))
    for j, (S, sc, point) in enumerate(run):
        a = evaluate(sc, index, chains=4, draws_per_chain=S, draw_rate=1.0, targets=targets)
        b = evaluate(sc, [dict(p) for p in plain], chains=4, draws_per_chain=S, draw_rate=1.0,
                     targets=targets)
        assert a == b, (S, len(plain))
        if j % 17 == 5:  # an earlier S than the last evaluation: the streak is walked back
            S0 = run[j // 2][0]
            assert evaluate(sc, index, chains=4, draws_per_chain=S0, draw_rate=1.0, targets=targets) == \
                evaluate(sc, plain, chains=4, draws_per_chain=S0, draw_rate=1.0, targets=targets)
        index.append(TrailPoint(point))
        plain.append(point)
    if disorder and plain:
        mixed = shuffled_a_little(rng, plain)
        S, sc, _ = run[-1]
        S += 1
        assert evaluate(sc, TrailIndex(TrailPoint(p) for p in mixed), chains=4, draws_per_chain=S,
                        draw_rate=1.0, targets=targets) == \
            evaluate(sc, plain, chains=4, draws_per_chain=S, draw_rate=1.0, targets=targets)


def test_the_pooled_rate_is_the_correctly_rounded_ratio_estimator():
    # ESS values spread over many orders of magnitude: naive running sums would lose the small ones
    rng = np.random.default_rng(3)
    S = 10_000.0
    draws = np.sort(rng.uniform(1, S - 1, 300))
    ess = 10.0 ** rng.uniform(-3, 6, 300)
    index = TrailIndex(TrailPoint({"draws_per_chain": float(s), "loo_elpd": -1.0, "loo_mcse": 0.1,
                                   "ess_bulk_min": float(e)}) for s, e in zip(draws, ess))
    value = 1234.5
    used = draws >= S / 2
    expected = math.fsum([*(s * (e / s) for s, e in zip(draws[used], ess[used])), S * (value / S)]) / \
        math.fsum([*draws[used], S])
    rate, n_used = index.at(S).pooled_rate("ess_bulk_min", value)
    assert n_used == int(used.sum()) and rate == expected


def test_a_verdict_reads_a_bounded_part_of_a_long_trail(monkeypatch):
    """5,000 passing points: the verdict of the next snapshot judges only the points added since
    the previous verdict (the passing streak is extended, not walked again) and validates none."""
    calls = {"passed": 0, "read": 0}
    point_passed, read_point = verdicts._point_passed, verdicts._read_point

    def counting_passed(*a, **kw):
        calls["passed"] += 1
        return point_passed(*a, **kw)

    def counting_read(*a, **kw):
        calls["read"] += 1
        return read_point(*a, **kw)

    monkeypatch.setattr(verdicts, "_point_passed", counting_passed)
    monkeypatch.setattr(verdicts, "_read_point", counting_read)
    sc = {"run": "r", "chains": 4, "draws": 4, "observations": 3,
          "loo": {"elpd": -1.0, "se": 8.0, "mcse": 0.05, "p_eff": 3.0},
          "waic": {"elpd": -1.0, "se": 8.0, "p_eff": 3.0},
          "pareto_k": {"max": 0.3, "threshold": 0.7, "above": [], "values": [0.1, 0.2, 0.3]},
          "mixing": {"rhat_max": 1.001, "ess_bulk_min": 5000.0, "ess_tail_min": 5000.0}}
    index = TrailIndex()
    for s in range(1, 5_001):
        index.append(TrailPoint({"draws_per_chain": float(s), "loo_elpd": -1.0, "loo_mcse": 0.05,
                                 "rhat_max": 1.001, "ess_bulk_min": 5000.0, "ess_tail_min": 5000.0,
                                 "passed": True}))
    evaluate(sc, index, chains=4, draws_per_chain=5_001, draw_rate=1.0)  # the first reading walks once
    index.append(TrailPoint({"draws_per_chain": 5_001.0, "loo_elpd": -1.0, "loo_mcse": 0.05,
                             "passed": True}))
    calls.update(passed=0, read=0)
    v = evaluate(sc, index, chains=4, draws_per_chain=5_002, draw_rate=1.0)
    assert v["hold"]["snapshots"] == 5_002  # the whole streak is counted ...
    assert calls == {"passed": 1, "read": 0}  # ... from the one point added since


@settings(max_examples=examples(40), deadline=None)
@given(seed=st.integers(0, 2**32 - 1), size=st.integers(0, 120), S=st.floats(1.0, 400.0))
def test_each_query_equals_a_walk_over_the_sorted_points(seed, size, S):
    """Each query of the index against the plain definition, walked over the sorted valid points
    before S (what the checks read: docs/verdict.md)."""
    rng = np.random.default_rng(seed)
    raw = []
    for _ in range(size):
        p = {"draws_per_chain": float(rng.integers(0, 400)), "loo_mcse": float(rng.uniform(0.01, 1)),
             "loo_elpd": float(rng.normal()) if rng.random() > 0.1 else None,
             "passed": bool(rng.random() > 0.3)}
        for key in ("rhat_max", "ess_bulk_min", "ess_tail_min"):
            p[key] = float(rng.uniform(-5, 100)) if rng.random() > 0.2 else None
        raw.append(p)
    view = TrailIndex(raw).at(S)
    pts = sorted([q for q in (verdicts._read_point(j, p)[2] for j, p in enumerate(raw))
                  if q is not None and q["s"] < S], key=lambda q: q["s"])
    assert view.count == len(pts)
    assert view.skipped == sum(1 for p in raw if p["loo_elpd"] is None and p["draws_per_chain"] < S)
    for key in ("mcse", "rhat", "ess_bulk_min", "ess_tail_min"):
        half = [q[key] for q in pts if q["s"] <= S / 2 and q[key] is not None]
        assert view.half_value(key) == (half[-1] if half else None)
    for key in ("ess_bulk_min", "ess_tail_min"):
        used = [(q["s"], q[key]) for q in pts if q["s"] >= S / 2 and q[key] is not None and q[key] > 0
                and q["s"] > 0]
        rate, n = view.pooled_rate(key, 7.0)
        if used:
            expected = math.fsum([s * (v / s) for s, v in used] + [S * (7.0 / S)]) / \
                math.fsum([s for s, _ in used] + [S])
        else:
            expected = 7.0 / S
        assert (rate, n) == (expected, len(used))
    cutoff = 0.6 * S
    anchors = [i for i, q in enumerate(pts) if q["s"] <= cutoff]
    assert view.last_at_or_before(cutoff) == (anchors[-1] if anchors else None)
    for a in {0, anchors[-1] if anchors else 0}:
        if a < len(pts):
            window = pts[a:]
            assert view.elpd_range(a) == (max(q["elpd"] for q in window), min(q["elpd"] for q in window))
            rhats = [q["rhat"] for q in window if q["rhat"] is not None]
            assert view.first_with("rhat", a) == (rhats[0] if rhats else None)
    count, start = 0, S
    for q in reversed(pts):
        if not q["passed"]:
            break
        count, start = count + q["covers"], q["s"]
    assert view.hold(Targets(), 4) == (count, start)
