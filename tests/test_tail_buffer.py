"""The PSIS-LOO tail buffer as a mergeable state, and incremental scoring from its cache.

References: the batch PSIS-LOO of the same draws (``psis_loo`` / ``batch_scores``, checked against
closed forms and scipy in test_psis_loo.py); the full evaluation of every tail
(``scores(incremental=False)``, the code path before the cache); the merge identity (the state of two
disjoint halves merged equals the state of the whole: Chan, Golub & LeVeque 1983 for the moments,
order statistics of a union for the buffer).
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from _tiers import examples
from chainvigil.estimators import StreamingScorer, batch_scores, psis_loo
from chainvigil.estimators.psis import psis, tail_length
from chainvigil.estimators.tail_buffer import TailBuffer
from chainvigil.longrun import CheckpointMismatch, RunScorer, load_checkpoint, save_checkpoint

from test_streaming import Feeder, assert_same, make_draws

RTOL = 1e-9


def close(a, b, what, rtol=RTOL):
    np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), rtol=rtol, atol=rtol, err_msg=what)


def buffer_of(blocks, n, k):
    tb = TailBuffer(n, k)
    for blk in blocks:
        tb.update(blk)
    return tb


@pytest.mark.parametrize("ka,kb", [(12, 12), (30, 12), (6, 40)])
def test_merged_halves_equal_the_whole_and_the_batch_path(ka, kb):
    rng = np.random.default_rng(21)
    n = 9
    ll = make_draws(rng, 1, 700, n, 2.0, 4)[0]
    ll[311, 3] = -np.inf  # a zero-likelihood draw in the second half
    blocks_a = [ll[i:min(i + 37, 300)] for i in range(0, 300, 37)]
    blocks_b = [ll[i:i + 53] for i in range(300, 700, 53)]
    r = rng.uniform(0.3, 1.2, n)
    need = int(tail_length(700, r).max()) + 1
    whole = buffer_of(blocks_a + blocks_b, n, max(need, 40))
    merged = buffer_of(blocks_a, n, max(need, ka)).merge(buffer_of(blocks_b, n, max(need, kb)))
    assert merged.draws == whole.draws == 700
    got, ref = merged.result(r), whole.result(r)
    for key in ("elpd", "mcse", "k"):
        close(got[key], ref[key], key, rtol=1e-12)
    assert got["zero"].tolist() == ref["zero"].tolist() == [i == 3 for i in range(n)]
    batch = psis_loo(ll, r)
    close(got["elpd"], batch["pointwise"], "elpd vs psis_loo")
    close(got["mcse"], batch["mcse_pointwise"], "mcse vs psis_loo")
    close(got["k"], batch["pareto_k"], "k-hat vs psis_loo")


def test_merge_of_an_empty_buffer_and_of_unfilled_buffers():
    rng = np.random.default_rng(22)
    ll = rng.normal(-1.0, 1.0, size=(60, 4))
    r = np.ones(4)
    a = buffer_of([ll[:20]], 4, 50).merge(buffer_of([ll[20:]], 4, 50))  # neither has a body yet
    b = buffer_of([ll], 4, 16).merge(TailBuffer(4, 16))
    for tb in (a, b):
        got = tb.result(r)
        batch = psis_loo(ll, r)
        close(got["elpd"], batch["pointwise"], "elpd")
        close(got["k"], batch["pareto_k"], "k-hat")


def test_scorers_of_different_chains_merge_into_the_scorer_of_all_draws():
    rng = np.random.default_rng(23)
    ll = make_draws(rng, 3, 250, 7, 3.0, 2)
    parts = []
    for chains in ((0, 1), (2,)):
        sc = StreamingScorer(7, n_params=2, point_loglik=-9.0, initial_k=120)
        for c in chains:
            for start in range(0, 250, 45):
                sc.add(f"c{c}", ll[c, start:start + 45])
        parts.append(sc)
    merged = parts[0].merge(parts[1])
    assert merged.draws == 750 and merged.chains == 3
    # draw order differs from the pooled array only by chains: batch scores do not depend on it
    assert_same(merged.scores(0.8), batch_scores(ll.reshape(-1, 7), 0.8, n_params=2, point_loglik=-9.0))


# ----------------------------------------------------------------------------- incremental scoring
def assert_parts_equal(inc, full, what):
    for key in ("elpd", "mcse", "k"):
        close(inc[key], full[key], f"{what}: {key}")
    assert inc["zero"].tolist() == full["zero"].tolist()


@settings(max_examples=examples(50), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(1, 8), per_chain=st.integers(20, 200),
       df=st.sampled_from([0.7, 1.0, 2.0, 30.0]), k0=st.integers(2, 80), bad=st.booleans(),
       r_mode=st.sampled_from(["fixed", "changing"]), restore=st.booleans())
def test_incremental_equals_full_and_batch_over_random_interleavings(seed, n, per_chain, df, k0, bad,
                                                                     r_mode, restore):
    # heavy tails (df <= 1: k-hat well above 0.7), -inf / NaN draws, r_eff changing between
    # snapshots, rebuilds (small k0), restores from to_state in the middle of the stream
    rng = np.random.default_rng(seed)
    chains = 2
    ll = make_draws(rng, chains, per_chain, n, df, 3)
    if bad:
        ll[1, rng.integers(per_chain), rng.integers(n)] = np.nan
        ll[0, rng.integers(per_chain), rng.integers(n)] = -np.inf
    feed = Feeder(n)
    sc = StreamingScorer(n, reader=feed.reader, initial_k=k0)
    r = rng.uniform(0.3, 1.3, n)
    pos = [0] * chains
    while any(p < per_chain for p in pos):
        c = int(rng.choice([i for i in range(chains) if pos[i] < per_chain]))
        blk = ll[c, pos[c]:pos[c] + int(rng.integers(1, 12))]
        pos[c] += blk.shape[0]
        feed.parts.append(blk)
        sc.add(c, blk)
        if sc.draws >= 2 and rng.random() < 0.4:
            if r_mode == "changing":
                r = np.clip(r * rng.uniform(0.9, 1.1, n), 0.05, 2.0)
            if restore and rng.random() < 0.2:
                sc = StreamingScorer.from_state(sc.to_state(), reader=feed.reader)
            inc = sc.scores(r)
            full = sc.scores(r, incremental=False)
            assert_same(inc, full)
    final = sc.scores(r)
    assert_same(final, batch_scores(feed.all(), r))
    assert_same(final, sc.scores(r, incremental=False))


def test_clean_rows_are_not_refitted_and_heavy_truncated_tails_stay_exact():
    # Cauchy-like log-likelihoods: k-hat > 0.7, and the smoothed weights reach the truncation at
    # the largest raw ratio (several tail weights equal to it). Between snapshots of 2 draws at
    # constant M only the rows with a new draw below their cutoff are refitted.
    rng = np.random.default_rng(24)
    n, S_end = 40, 3000
    # ratios exp(-ll) = U^(-shape): a Pareto tail of that shape (k-hat estimates it)
    shape = np.linspace(0.2, 1.3, n)
    ll = shape * np.log(rng.uniform(size=(S_end, n)))
    r = np.full(n, 0.9)
    sc = StreamingScorer(n, expected_draws=S_end)
    sc.add(0, ll[:2000])
    sc.scores(r)
    assert sc.refits == n
    refits, checked = [], 0
    for start in range(2000, S_end, 2):
        sc.add(0, ll[start:start + 2])
        same_m = np.array_equal(tail_length(start, r), tail_length(start + 2, r))
        s = sc.scores(r)
        if same_m:  # only rows with a draw below their cutoff
            refits.append(sc.refits)
        if start % 250 == 0:
            assert_same(s, batch_scores(ll[:start + 2], r))
            checked += 1
    assert checked >= 3 and max(refits) < n and np.mean(refits) < 0.2 * n
    b = psis_loo(ll, r)
    assert np.sum(b["pareto_k"] > 0.7) >= 10  # heavy tails were exercised
    lw, _ = psis(-ll, r)
    truncated = [(np.sum(lw[:, i] == lw[:, i].max()) >= 2) for i in range(n)]
    assert sum(truncated) >= 1  # the truncation at the largest raw ratio was active
    assert_same(sc.scores(r), batch_scores(ll, r))


def test_a_restored_scorer_uses_its_cache_and_continues_like_the_uninterrupted_one(tmp_path):
    rng = np.random.default_rng(25)
    n = 30
    ll = make_draws(rng, 2, 1500, n, 2.0, 2)
    r = np.full(n, 0.7)
    whole = RunScorer(n, expected_draws=3000)
    for start in range(0, 1000, 100):
        for c in range(2):
            whole.add(f"c{c}", ll[c, start:start + 100])
    whole.scores(r)
    path = tmp_path / "cp.npz"
    save_checkpoint(path, whole, whole.chain_draws())
    restored, covered = load_checkpoint(path, n=n, committed=whole.chain_draws())
    assert covered == {"c0": 1000, "c1": 1000}
    # one draw at constant M: the cache restored from the checkpoint answers the clean rows
    assert np.array_equal(tail_length(2000, r), tail_length(2001, r))
    for sc in (whole, restored):
        sc.add("c0", ll[0, 1000:1001])
    a, b = whole.scores(r), restored.scores(r)
    assert restored.refits == whole.refits < n
    assert_same(b, a)
    for start in range(1001, 1500, 70):
        for sc in (whole, restored):
            sc.add("c0", ll[0, start:start + 70])
            sc.add("c1", ll[1, start - 1:start + 69])
        assert_same(restored.scores(r), whole.scores(r))


def test_a_checkpoint_of_the_old_state_format_is_refused_with_a_clear_reason(tmp_path):
    rng = np.random.default_rng(26)
    sc = RunScorer(5, initial_k=20)
    sc.add("a", rng.normal(size=(50, 5)))
    path = tmp_path / "old.npz"
    state = sc.to_state()
    state["format"] = np.asarray(1, dtype=np.int64)
    with pytest.raises(ValueError, match="streamed again"):
        RunScorer.from_state(state)
    save_checkpoint(path, sc, {"a": 50})
    with np.load(path, allow_pickle=False) as data:
        saved = {k: data[k] for k in data.files}
    saved["checkpoint_format"] = np.asarray(1, dtype=np.int64)  # as a checkpoint of the last version
    np.savez(path, **saved)
    with pytest.raises(CheckpointMismatch, match="format 1 is not the current format"):
        load_checkpoint(path, n=5, committed={"a": 50})


def test_a_column_spanning_more_than_690_nats_keeps_the_cache_exact():
    # a draw 750 nats above the rest: the body terms are then direct exponentials instead of
    # quotients of the WAIC exponentials, and the rest sums of the cache follow the same route
    rng = np.random.default_rng(27)
    n = 6
    ll = rng.normal(-2.0, 1.0, size=(900, n))
    ll[500, 2] = 750.0
    r = np.full(n, 0.8)
    sc = StreamingScorer(n, initial_k=200)
    for start in range(0, 900, 20):
        sc.add(0, ll[start:start + 20])
        if start >= 100:
            inc = sc.scores(r)
            assert_same(inc, sc.scores(r, incremental=False))
    assert_same(sc.scores(r), batch_scores(ll, r))


def test_a_rebuild_into_a_larger_buffer_keeps_the_tail_fit_cache():
    # The rebuild rereads the same draws into a larger buffer: the cached tail fits still describe
    # them, so a scorer that rebuilds refits exactly the rows that one with room from the start
    # refits (the rows whose tail changed), and both stay exact.
    rng = np.random.default_rng(28)
    n = 40
    r = np.where(np.arange(n) < 4, 0.15, 1.0)  # four rows need a long tail, the rest a short one
    feed = Feeder(n)
    small = StreamingScorer(n, reader=feed.reader, initial_k=200)  # rebuilds: K 200 -> 402 -> 804
    roomy = StreamingScorer(n, initial_k=1000)
    rebuilt = []
    for start in range(0, 3000, 10):
        blk = rng.standard_t(3.0, size=(10, n))
        feed.parts.append(blk)
        small.add(0, blk)
        roomy.add(0, blk)
        if start < 600:
            continue
        before = small.rebuilds
        a, b = small.scores(r), roomy.scores(r)
        assert small.refits == roomy.refits
        if small.rebuilds > before:
            rebuilt.append(small.refits)
            assert_same(a, b)
    assert len(rebuilt) == 2 and max(rebuilt) < n, rebuilt
    assert_same(small.scores(r), batch_scores(feed.all(), r))


def test_refit_work_counts_the_grid_evaluations_of_the_refitted_rows():
    # a Zhang-Stephens fit over M exceedances evaluates them at 30 + floor(sqrt(M)) grid points
    # (Zhang & Stephens 2009, Technometrics 51(3)); the first snapshot refits every row
    rng = np.random.default_rng(29)
    n = 12
    r = rng.uniform(0.3, 1.0, n)
    sc = StreamingScorer(n, initial_k=400)
    sc.add(0, rng.standard_t(3.0, size=(900, n)))
    sc.scores(r)
    M = tail_length(900, r)
    assert sc.refits == n and sc.refit_work == float(np.sum(M * (30 + np.floor(np.sqrt(M)))))
    sc.scores(r)  # nothing changed: nothing refitted
    assert sc.refits == 0 and sc.refit_work == 0.0
