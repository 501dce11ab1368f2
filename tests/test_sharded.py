"""ShardedScorer equals StreamingScorer (and so batch_scores) on the same blocks, any shard count.

Reference: the unsharded streaming scorer, itself held to batch_scores in test_streaming.py (batch
is checked against closed forms and scipy in test_psis_loo.py / test_information.py); the totals
are checked against batch_scores directly too.
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from _tiers import examples
from chainvigil.estimators import StreamingScorer, batch_scores
from chainvigil.estimators.sharded import (LocalPool, ShardedScorer, shard_add, shard_bounds, shard_new,
                                           shard_parts)

from test_streaming import Feeder, assert_same, close, make_draws


def feed_both(ll, rng, shards, k0, pool=None, max_block=40):
    chains, per_chain, n = ll.shape
    feed = Feeder(n)
    one = StreamingScorer(n, n_params=3, point_loglik=-12.5, reader=feed.reader, initial_k=k0)
    many = ShardedScorer(n, shards=shards, pool=pool, n_params=3, point_loglik=-12.5, reader=feed.reader,
                         initial_k=k0)
    pos = [0] * chains
    while any(p < per_chain for p in pos):
        c = int(rng.choice([i for i in range(chains) if pos[i] < per_chain]))
        blk = ll[c, pos[c]:pos[c] + int(rng.integers(1, max_block))]
        pos[c] += blk.shape[0]
        feed.parts.append(blk)
        one.add(f"c{c}", blk)
        many.add(f"c{c}", blk)
    return feed, one, many


# the full suite's property over shard counts and block sizes; the fast tier checks sharded ==
# unsharded at every snapshot of one stream (test_sharded_incremental_scores_between_blocks_...)
@pytest.mark.slow
@settings(max_examples=examples(40), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), shards=st.integers(1, 9), n=st.integers(1, 12),
       per_chain=st.integers(6, 160), max_block=st.integers(2, 60), k0=st.integers(2, 40),
       r_mode=st.sampled_from(["one", "vector"]))
def test_sharded_equals_unsharded_any_shard_count_and_block_size(seed, shards, n, per_chain, max_block, k0,
                                                                  r_mode):
    rng = np.random.default_rng(seed)
    ll = make_draws(rng, 3, per_chain, n, 2.0, 2)
    feed, one, many = feed_both(ll, rng, shards, k0, max_block=max_block)
    r = None if r_mode == "one" else rng.uniform(0.1, 1.5, n)
    s1, s2 = one.scores(r), many.scores(r)
    assert_same(s2, s1)
    close(s2.loo["mcse"], s1.loo["mcse"], "loo.mcse")
    assert many.draws == one.draws and many.chains == one.chains == 3
    assert many.k == one.k and many.rebuilds == one.rebuilds
    # and against every draw at once
    assert_same(s2, batch_scores(feed.all(), 1.0 if r is None else r, n_params=3, point_loglik=-12.5))
    many.close()


def test_bad_and_zero_likelihood_observations_in_different_shards():
    rng = np.random.default_rng(4)
    ll = make_draws(rng, 2, 120, 10, 3.0, 0)
    ll[0, 5, 1] = np.nan  # shard 0
    ll[1, 7, 8] = -np.inf  # last shard
    feed, one, many = feed_both(ll, rng, 3, 16)
    s1, s2 = one.scores(0.7), many.scores(0.7)
    assert s2.flags == s1.flags and s2.flags["bad_observations"] == [1]
    assert s2.flags["zero_likelihood_observations"] == [8]
    np.testing.assert_array_equal(np.isnan(s2.loo_pointwise), np.isnan(s1.loo_pointwise))
    assert np.isnan(s2.loo["elpd"]) and np.isnan(s2.dic["elpd"])


def test_shard_tasks_are_pure_and_bounds_cover_every_observation():
    assert shard_bounds(10, 3) == [(0, 3), (3, 6), (6, 10)]
    assert shard_bounds(2, 5) == [(0, 1), (1, 2)]
    for n in range(1, 40):
        for k in range(1, 12):
            b = shard_bounds(n, k)
            assert b[0][0] == 0 and b[-1][1] == n and len(b) == min(n, k)
            assert all(stop > start for start, stop in b) and all(b[i][1] == b[i + 1][0] for i in range(len(b) - 1))
    state = shard_new(4, 8)
    before = {k: np.array(v, copy=True) for k, v in state.items()}
    block = np.random.default_rng(0).normal(size=(20, 4))
    out = shard_add(state, block)
    for key, value in before.items():  # the input state is unchanged
        np.testing.assert_array_equal(state[key], value, err_msg=key)
    np.testing.assert_allclose(out["totals"], block.sum(axis=1), rtol=1e-12)
    parts = shard_parts(out["state"], np.ones(4))
    assert set(parts) == {"elpd", "mcse", "k", "zero", "lse", "m2", "bad"}
    # lse is log sum_s exp ll_s (closed form per column)
    np.testing.assert_allclose(parts["lse"], np.log(np.exp(block).sum(axis=0)), rtol=1e-12)


def test_shared_pool_and_wrong_shapes():
    pool = LocalPool(2)
    try:
        sc = ShardedScorer(5, shards=2, pool=pool)
        with pytest.raises(ValueError, match=r"\(draws, 5\)"):
            sc.add(0, np.zeros((3, 4)))
        with pytest.raises(ValueError, match="at least 2 draws"):
            sc.scores()
        with pytest.raises(ValueError, match="shards"):
            ShardedScorer(5, shards=0)
        sc = ShardedScorer(5, shards=2, pool=pool, initial_k=4)  # no reader: a clear error
        sc.add(0, np.random.default_rng(1).normal(size=(200, 5)))
        with pytest.raises(ValueError, match="rebuild source"):
            sc.scores()
    finally:
        pool.close()


@pytest.mark.slow
def test_sharded_over_a_dask_local_cluster_equals_unsharded():
    distributed = pytest.importorskip("distributed")
    from chainvigil.estimators.sharded import DaskPool

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=40) as cluster, distributed.Client(cluster) as client:
        rng = np.random.default_rng(11)
        ll = make_draws(rng, 4, 150, 30, 2.0, 3)
        pool = DaskPool(client, batch_values=300)  # small batches: many sends, each chained on the last
        feed, one, many = feed_both(ll, rng, 5, 12, pool=pool)
        r = rng.uniform(0.3, 1.2, 30)
        s1, s2 = one.scores(r), many.scores(r)
        assert many.rebuilds >= 1  # the rebuild path (draws sent to the workers) was taken
        assert_same(s2, s1)
        # the states live on the workers, not in this process
        assert all(type(h).__name__ == "Future" for h in many._states)


def test_no_dask_import_unless_a_cluster_is_asked_for():
    import subprocess
    import sys

    code = ("import sys, numpy as np; from chainvigil.estimators import ShardedScorer; import chainvigil.service; "
            "s = ShardedScorer(6, shards=3); s.add(0, np.zeros((4, 6))); s.scores(); "
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_sharded_incremental_scores_between_blocks_equal_unsharded_and_full():
    # every snapshot: each shard refits only its changed tails and keeps its cache (shard_score);
    # references: the unsharded scorer and the full evaluation of every tail (shard_parts)
    rng = np.random.default_rng(12)
    n = 11
    ll = make_draws(rng, 2, 400, n, 1.0, 3)
    feed = Feeder(n)
    one = StreamingScorer(n, reader=feed.reader, initial_k=30)
    many = ShardedScorer(n, shards=3, reader=feed.reader, initial_k=30)
    r = rng.uniform(0.4, 1.2, n)
    for start in range(0, 400, 7):
        for c in range(2):
            blk = ll[c, start:start + 7]
            feed.parts.append(blk)
            one.add(c, blk)
            many.add(c, blk)
        r = r * rng.uniform(0.97, 1.03, n)
        s_many = many.scores(r)
        assert_same(s_many, one.scores(r))
        if start % 70 == 0:
            full = np.concatenate([shard_parts(st, r[a:b])["elpd"] for st, (a, b)
                                   in zip(many._states, many.bounds)])
            close(s_many.loo_pointwise, full, "sharded incremental vs every tail refitted")
    assert_same(many.scores(r), batch_scores(feed.all(), r))
    many.close()
