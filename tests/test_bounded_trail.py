"""The verdict on a bounded trail (``chainvigil.verdict.bounded_trail``) equals the verdict on the
whole trail, for long synthetic runs: the trimmed trail is what the service keeps in memory and
restores from the history, so a snapshot's cost does not depend on how many snapshots came before."""

from __future__ import annotations

import math

import numpy as np
import pytest

from chainvigil.verdict import Targets, bounded_trail, evaluate


def scores_at(rng, S, elpd, mcse, rhat, ess):
    return {"run": "r", "chains": 4, "draws": 4 * S, "observations": 3,
            "loo": {"elpd": elpd, "se": 8.0, "mcse": mcse, "p_eff": 3.0},
            "waic": {"elpd": elpd, "se": 8.0, "p_eff": 3.0},
            "pareto_k": {"max": 0.3, "threshold": 0.7, "above": [], "values": [0.1, 0.2, 0.3]},
            "mixing": {"rhat_max": rhat, "ess_bulk_min": ess, "ess_tail_min": 0.8 * ess,
                       "params": {"mu": {"mean": 0.0, "mcse": 0.01, "rhat": rhat, "ess_bulk": ess,
                                         "ess_tail": 0.8 * ess}}},
            "verdict": None}


def synthetic_run(seed, steps, *, step_draws=(1, 6), gaps=0.03, pass_bias=0.0):
    """Yield (S, scores, point) for a long run: elpd a slow random walk around -120, MCSE falling
    as 1/sqrt(S) with noise, R-hat and ESS with noise (some points without R-hat/ESS or a finite
    elpd), and a recorded ``passed`` that forms long streaks."""
    rng = np.random.default_rng(seed)
    S, elpd, passed = 20, -120.0, False
    for _ in range(steps):
        S += int(rng.integers(*step_draws))
        elpd += rng.normal(0, 0.02)
        mcse = 3.0 / math.sqrt(S) * (1 + 0.1 * rng.standard_normal())
        rhat = 1 + 2.0 / S * abs(1 + 0.3 * rng.standard_normal())
        ess = 0.3 * 4 * S * (1 + 0.2 * rng.standard_normal())
        if rng.random() < 0.02:
            passed = not passed if rng.random() > pass_bias else True
        sc = scores_at(rng, S, elpd, mcse, rhat, ess)
        point = {"draws_per_chain": S, "loo_elpd": elpd if rng.random() > gaps else None,
                 "loo_mcse": mcse, "time": float(S), "rhat_max": rhat if rng.random() > gaps else None,
                 "ess_bulk_min": ess, "ess_tail_min": 0.8 * ess if rng.random() > gaps else None,
                 "passed": passed}
        yield S, sc, point


@pytest.mark.slow
@pytest.mark.parametrize("seed,targets,pass_bias", [
    (1, Targets(), 0.0),
    (2, Targets(stability_window=0.6), 0.0),       # the settled anchor before the half anchors
    (3, Targets(mcse_elpd_max=0.2), 0.7),          # long passing streaks that reach the dropped part
    (4, Targets(stability_window=0.05), 0.9),
])
def test_verdict_on_bounded_trail_equals_verdict_on_full_trail(seed, targets, pass_bias):
    full, bounded = [], []
    compared = 0
    longest = 0
    for S, sc, point in synthetic_run(seed, 1500, pass_bias=pass_bias):
        a = evaluate(sc, full, chains=4, draws_per_chain=S, draw_rate=1.0, targets=targets)
        b = evaluate(sc, bounded, chains=4, draws_per_chain=S, draw_rate=1.0, targets=targets)
        assert a == b, (S, len(full), len(bounded))
        compared += 1
        longest = max(longest, a["hold"]["snapshots"])
        full.append(point)
        # as the service does: trim after each snapshot, at the draws of the previous one
        bounded = bounded_trail(bounded + [point], targets, chains=4,
                                upto=full[-2]["draws_per_chain"] if len(full) > 1 else None)
    assert compared == 1500
    # the bound is real: far fewer points than the whole trail ...
    assert len(bounded) < 0.7 * len(full)
    if pass_bias > 0.5:
        assert longest > 100  # ... and streaks longer than the kept part were counted right


def test_bounded_trail_keeps_the_points_whose_window_is_not_spanned():
    """Before any point lies at or below (1 - w) S every point counts (the no-anchor branch)."""
    trail = [{"draws_per_chain": s, "loo_elpd": -1.0, "loo_mcse": 0.1} for s in (90, 95, 99)]
    assert bounded_trail(trail, Targets(stability_window=0.2), upto=100) == trail


@pytest.mark.parametrize("growth,snapshots,settled_after", [
    (1.01, 700, 200),                                          # 70 points between S/2 and S
    pytest.param(1.002, 3000, 1000, marks=pytest.mark.slow),   # 347 points: the same at a finer cadence
])
def test_bounded_trail_size_stays_flat_over_a_long_run(growth, snapshots, settled_after):
    """At a steady cadence the kept points cover the draws since about (1 - w) S and S/2: a fixed
    fraction of the draws, not a growing count of snapshots. With draws growing linearly the kept
    count grows like the number of snapshots in [S/2, S]; with snapshots spaced geometrically in
    draws (a stretching cadence) it stays flat."""
    trail, sizes = [], []
    S = 100.0
    for i in range(snapshots):
        S *= growth
        trail = bounded_trail(trail + [{"draws_per_chain": S, "loo_elpd": -1.0, "loo_mcse": 0.1,
                                        "rhat_max": 1.0, "ess_bulk_min": 1.0, "ess_tail_min": 1.0,
                                        "passed": False}], upto=S)
        sizes.append(len(trail))
    # log(2)/log(growth) points between S/2 and S (69.7 at 1.01, 346.9 at 1.002)
    assert max(sizes[settled_after:]) <= math.log(2) / math.log(growth) + 3
    assert max(sizes[settled_after:]) - min(sizes[settled_after:]) <= 2
