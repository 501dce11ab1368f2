"""The tail lag: a live snapshot reuses an observation's PSIS tail fit until its tail has moved by more
than a fraction of its length (``TailBuffer.lag``, ``StreamingScorer.tail_lag``, ``--tail-lag``).

References: the batch PSIS-LOO of the same draws (``batch_scores``, checked against closed forms and
scipy in test_psis_loo.py) and, for the refit rule, the tail length M = ceil(min(S/5, 3 sqrt(S/r_eff)))
of PSIS (Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25(72)), computed here by hand.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from _ar1_model import ar1_normal_loglik
from chainvigil.estimators import StreamingScorer, batch_scores
from chainvigil.estimators.tail_buffer import TailBuffer
from chainvigil.longrun import TAIL_LAG, RunScorer, load_checkpoint, save_checkpoint
from chainvigil.service import Service
from chainvigil.writer import ChainWriter


def one_row(S=2000, seed=0):
    rng = np.random.default_rng(seed)
    ll = rng.normal(size=(S, 1))
    return ll


def test_a_lagged_tail_is_refitted_once_the_draws_that_entered_it_exceed_the_lag():
    S = 2000
    ll = one_row(S)
    r = np.ones(1)
    M = math.ceil(min(S / 5, 3 * math.sqrt(S)))  # 135, and still 135 for the next 7 draws
    assert M == math.ceil(3 * math.sqrt(S + 7)) == 135
    lower = np.sort(ll[:, 0])
    inside = 0.5 * (lower[0] + lower[M])  # below the cutoff (the (M+1)-th smallest), above the minimum
    allowed = int(0.05 * M)  # 6 late draws are within the lag, the 7th is not
    lagged, exact = StreamingScorer(1, expected_draws=S + 10, tail_lag=0.05), StreamingScorer(1, expected_draws=S + 10)
    for sc in (lagged, exact):
        sc.add(0, ll)
        sc.scores(r)
        assert sc.refits == 1
    for i in range(1, allowed + 2):
        for sc in (lagged, exact):
            sc.add(0, np.array([[inside]]))
            sc.scores(r)
        assert exact.refits == 1  # the control: without a lag every draw into the tail refits
        if i <= allowed:
            assert (lagged.refits, lagged.lagged_rows) == (0, 1), i
        else:
            assert (lagged.refits, lagged.lagged_rows) == (1, 0), i
    # refitted, the lagged scorer gives the batch numbers again
    every = np.concatenate([ll, np.full((allowed + 1, 1), inside)])
    assert lagged.scores(r).loo["elpd"] == pytest.approx(batch_scores(every, r).loo["elpd"], rel=1e-12)


def test_a_new_largest_ratio_is_refitted_at_once_whatever_the_lag():
    S = 2000
    ll = one_row(S, seed=1)
    r = np.ones(1)
    sc = StreamingScorer(1, expected_draws=S + 10, tail_lag=0.5)
    sc.add(0, ll)
    sc.scores(r)
    sc.add(0, np.array([[ll.min() - 3.0]]))  # the smallest log-likelihood: the largest ratio
    s = sc.scores(r)
    assert sc.refits == 1 and sc.lagged_rows == 0
    every = np.concatenate([ll, [[ll.min() - 3.0]]])
    assert s.loo["elpd"] == pytest.approx(batch_scores(every, r).loo["elpd"], rel=1e-12)


def test_a_change_of_the_tail_length_within_the_lag_keeps_the_fit():
    # M = ceil(3 sqrt(S / r_eff)): halving r_eff from 1 to 0.98 moves M by ~1 %, within a 5 % lag
    S = 2000
    ll = one_row(S, seed=2)
    sc = StreamingScorer(1, expected_draws=S, tail_lag=0.05)
    sc.add(0, ll)
    sc.scores(np.ones(1))
    sc.scores(np.full(1, 0.98))
    assert math.ceil(3 * math.sqrt(S / 0.98)) != math.ceil(3 * math.sqrt(S))
    assert (sc.refits, sc.lagged_rows) == (0, 1)
    sc.scores(np.full(1, 0.8))  # M moves by 12 %: refitted
    assert (sc.refits, sc.lagged_rows) == (1, 0)


def test_a_lagged_stream_stays_far_inside_its_monte_carlo_error_and_refits_far_less():
    # AR(1) draws of a normal mean, with outlying observations (heavier tails): the lagged scorer
    # against the batch PSIS-LOO of the same draws at many points of the stream
    rng = np.random.default_rng(11)
    n, chains, per = 40, 4, 700
    ll = np.stack([ar1_normal_loglik(rng, per, n, rho=0.7, outlier_every=7)[0] for _ in range(chains)])
    r = np.full(n, 0.5)
    lagged = StreamingScorer(n, expected_draws=chains * per, tail_lag=TAIL_LAG)
    exact = StreamingScorer(n, expected_draws=chains * per)
    refits = {"lagged": 0, "exact": 0}
    worst, compared, served = 0.0, 0, 0
    for t in range(0, per, 2):
        for c in range(chains):
            lagged.add(c, ll[c, t:t + 2])
            exact.add(c, ll[c, t:t + 2])
        s = lagged.scores(r)
        exact.scores(r)
        refits["lagged"] += lagged.refits
        refits["exact"] += exact.refits
        served += lagged.lagged_rows
        if t % 50 == 48 and t > 100:
            b = batch_scores(ll[:, :t + 2].reshape(-1, n), r)
            worst = max(worst, abs(s.loo["elpd"] - b.loo["elpd"]) / s.loo["mcse_independent"])
            compared += 1
    assert compared >= 10 and served > 0  # the lag was in use
    assert worst < 0.15  # measured 0.02-0.06 over four seeds
    assert refits["lagged"] * 3 < refits["exact"]  # 3.7 times fewer here, more as the run grows


def test_the_late_draw_counts_are_saved_with_the_state_and_an_older_state_loads(tmp_path):
    S = 2000
    ll = one_row(S, seed=3)
    r = np.ones(1)
    sc = RunScorer(1, expected_draws=S + 10)
    sc.tail_lag = 0.05
    sc.add("a", ll)
    sc.scores(r)
    lower = np.sort(ll[:, 0])
    sc.add("a", np.array([[0.5 * (lower[0] + lower[100])]]))
    path = tmp_path / "cp.npz"
    save_checkpoint(path, sc, sc.chain_draws())
    restored, _ = load_checkpoint(path, n=1, committed=sc.chain_draws())
    assert restored.tail_lag == 0.0  # not part of the state: the owner sets it
    restored.tail_lag = 0.05
    assert np.array_equal(restored._tail.c_late, sc._tail.c_late) and sc._tail.c_late[0] == 1
    a, b = sc.scores(r), restored.scores(r)
    assert (restored.refits, restored.lagged_rows) == (sc.refits, sc.lagged_rows) == (0, 1)
    assert a.loo["elpd"] == b.loo["elpd"]
    state = sc._tail.to_state()
    del state["c_late"]  # a state written before the lag existed
    assert TailBuffer.from_state(state).c_late.tolist() == [0]
    with pytest.raises(ValueError, match="tail lag"):
        sc.tail_lag = 1.0


def test_the_last_snapshot_of_a_clean_stop_is_exact(root):
    """Live snapshots serve some tails from a lagged fit; the final row of a clean stop refits them,
    even when no draw came after the last live snapshot."""
    rng = np.random.default_rng(4)
    run = root / "r"
    n = 30
    svc = Service(root, every=0.0, checkpoint_every=1e9, tail_lag=0.2)
    try:
        served = 0
        for _ in range(12):
            for c in ("a", "b"):
                with ChainWriter(run, c, param_names=("mu",)) as w:
                    w.append(*ar1_normal_loglik(rng, 50, n, outlier_every=5))
            svc.cycle(force=True)
            served = max(served, svc.runs["r"].scorer.lagged_rows)
        state = svc.runs["r"]
        svc.passes.final()  # the joint-MCSE pass over these very draws, taken in: then nothing is due
        svc.cycle(force=True)
        assert state.snapshot_r_eff_per_chain == 600
        assert served > 0 and state.scorer.lagged_rows > 0 and not svc.cadence.stale(state)
        live = svc.history.latest_snapshot("r")
    finally:
        svc.finish()
    final = svc.history.latest_snapshot("r")
    assert final["id"] != live["id"] and final["draws_per_chain"] == live["draws_per_chain"] == 600
    stacked = np.stack([svc.store.read_loglik("r", c) for c in ("a", "b")])
    batch = batch_scores(stacked, r_eff=svc.runs["r"].scorer.r_eff()).to_dict()
    assert final["loo_elpd"] == pytest.approx(batch["loo"]["elpd"], rel=1e-9)
    assert live["loo_elpd"] != pytest.approx(batch["loo"]["elpd"], rel=1e-9)  # the lag was in it
    # each row says how many observations a lagged fit served (history schema 11)
    assert live["loo_lagged"] > 0 and final["loo_lagged"] == 0
    from chainvigil.storage.history import snapshot_record
    assert snapshot_record(live)["loo"]["lagged_observations"] == live["loo_lagged"]


def test_the_service_checks_the_lag_and_the_help_names_the_default(root, capsys):
    from chainvigil.cli import build_parser
    from chainvigil.service import ServiceError

    with pytest.raises(ServiceError, match="tail-lag"):
        Service(root, tail_lag=1.5)
    watch = build_parser()._subparsers._group_actions[0].choices["watch"]
    help_text = " ".join(watch.format_help().split())
    assert f"(default {TAIL_LAG:g}:" in help_text
