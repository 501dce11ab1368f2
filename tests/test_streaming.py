"""StreamingScorer equals batch_scores on the same draws and r_eff (docs/numerics.md, streaming invariant).

The reference is the batch path (itself checked against closed forms and scipy in test_psis_loo.py,
test_waic.py, test_information.py); the property is checked over random block sequences with
hypothesis.
"""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from _tiers import examples
from chainvigil.estimators import StreamingScorer, batch_scores

RTOL = 1e-9


def close(a, b, what):
    np.testing.assert_allclose(np.asarray(a, float), np.asarray(b, float), rtol=RTOL, atol=1e-10, err_msg=what)


def assert_same(s, b):
    # loo.mcse of batch scores is the joint MCSE (needs every draw); the streaming state gives
    # sqrt(sum_i mcse_i^2), which batch scores keep as mcse_independent
    for part, keys in (("loo", ("elpd", "se", "mcse_independent", "p_eff")), ("waic", ("elpd", "se", "p_eff")),
                       ("dic", ("elpd", "p_eff"))):
        for k in keys:
            close(getattr(s, part)[k], getattr(b, part)[k], f"{part}.{k}")
    assert (s.aic is None) == (b.aic is None)
    if s.aic is not None:
        close(s.aic["elpd"], b.aic["elpd"], "aic")
    close(s.loo_pointwise, b.loo_pointwise, "loo pointwise")
    close(s.loo_mcse_pointwise, b.loo_mcse_pointwise, "loo mcse pointwise")
    close(s.waic_pointwise, b.waic_pointwise, "waic pointwise")
    close(s.pareto_k, b.pareto_k, "k-hat")
    assert s.flags == b.flags
    assert s.draws == b.draws and s.k_threshold == b.k_threshold


class Feeder:
    """Feeds per-chain blocks and keeps every draw in memory as the rebuild source."""

    def __init__(self, n):
        self.parts = []
        self.n = n

    def reader(self, a, b):
        return np.concatenate(self.parts, axis=0)[:, a:b]

    def all(self):
        return np.concatenate(self.parts, axis=0)


def make_draws(rng, chains, per_chain, n, df, extremes):
    ll = rng.standard_t(df, size=(chains, per_chain, n)) * rng.uniform(0.1, 3.0, n) - rng.uniform(0, 5, n)
    for _ in range(extremes):
        ll[rng.integers(chains), rng.integers(per_chain), rng.integers(n)] = -rng.uniform(50, 500)
    return ll


@settings(max_examples=examples(60), deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), chains=st.integers(1, 4), per_chain=st.integers(6, 220),
       n=st.integers(1, 7), df=st.sampled_from([1.0, 2.0, 3.0, 30.0]), extremes=st.integers(0, 4),
       k0=st.integers(2, 60), r_mode=st.sampled_from(["one", "scalar", "vector"]),
       n_params=st.sampled_from([None, 3]), point=st.sampled_from([None, -12.5]))
def test_streaming_equals_batch_any_interleaving(seed, chains, per_chain, n, df, extremes, k0, r_mode,
                                                 n_params, point):
    rng = np.random.default_rng(seed)
    ll = make_draws(rng, chains, per_chain, n, df, extremes)
    feed = Feeder(n)
    sc = StreamingScorer(n, n_params=n_params, point_loglik=point, reader=feed.reader, initial_k=k0)
    pos = [0] * chains
    order = []
    while any(p < per_chain for p in pos):  # random interleaving and block sizes
        c = int(rng.choice([i for i in range(chains) if pos[i] < per_chain]))
        size = int(rng.integers(1, 40))
        blk = ll[c, pos[c]:pos[c] + size]
        pos[c] += blk.shape[0]
        feed.parts.append(blk)
        order.append(c)
        sc.add(f"chain{c}", blk)
        if rng.random() < 0.15 and sc.draws >= 2:  # intermediate scores must not disturb the state
            sc.scores()
    r = {"one": None, "scalar": float(rng.uniform(0.2, 1.5)), "vector": rng.uniform(0.1, 1.5, n)}[r_mode]
    s = sc.scores(r)
    b = batch_scores(feed.all(), 1.0 if r is None else r, n_params=n_params, point_loglik=point)
    assert sc.chains == chains and sc.draws == chains * per_chain
    assert_same(s, b)


def test_rebuild_path_is_taken_and_exact():
    rng = np.random.default_rng(1)
    ll = make_draws(rng, 3, 400, 9, 2.0, 3)
    feed = Feeder(9)
    sc = StreamingScorer(9, reader=feed.reader, initial_k=8)
    for start in range(0, 400, 50):
        for c in range(3):
            feed.parts.append(ll[c, start:start + 50])
            sc.add(c, ll[c, start:start + 50])
        if sc.draws >= 300:
            assert_same(sc.scores(0.5), batch_scores(feed.all(), 0.5))
    assert sc.rebuilds >= 2  # K grows geometrically: not once per scores call
    before = sc.rebuilds
    sc.scores(0.5)
    assert sc.rebuilds == before
    assert sc.k >= int(np.ceil(min(1200 / 5, 3 * np.sqrt(1200 / 0.5)))) + 1  # K >= M + 1


def test_without_reader_a_too_small_buffer_is_a_clear_error():
    rng = np.random.default_rng(2)
    sc = StreamingScorer(4, initial_k=10)
    sc.add(0, rng.normal(size=(500, 4)))
    with pytest.raises(ValueError, match="rebuild source"):
        sc.scores()
    # sized from the expected number of draws, no reader is needed
    sc2 = StreamingScorer(4, expected_draws=2000)
    blk = rng.normal(size=(2000, 4))
    for i in range(0, 2000, 100):
        sc2.add(0, blk[i:i + 100])
    assert_same(sc2.scores(), batch_scores(blk, 1.0))


def test_bad_and_zero_likelihood_input_streaming_equals_batch():
    # Documented conventions (monitor/estimators/loo.py): NaN/+inf -> bad, -inf -> zero likelihood
    rng = np.random.default_rng(3)
    ll = rng.normal(-1, 1, size=(2, 300, 6))
    ll[0, 10, 1] = np.nan
    ll[1, 200, 2] = np.inf
    ll[1, 5, 4] = -np.inf
    ll[:, :, 5] = -3.0  # constant column
    feed = Feeder(6)
    sc = StreamingScorer(6, n_params=2, reader=feed.reader, initial_k=16)
    for start in range(0, 300, 30):
        for c in range(2):
            feed.parts.append(ll[c, start:start + 30])
            sc.add(c, ll[c, start:start + 30])
    data = feed.all()
    kept = data.copy()
    s, b = sc.scores(0.8), batch_scores(data, 0.8, n_params=2)
    assert np.array_equal(data, kept, equal_nan=True)  # the caller's array is left untouched
    assert s.flags["bad_observations"] == [1, 2]
    assert s.flags["zero_likelihood_observations"] == [4]
    assert s.flags["flat_tail_observations"] == [5]
    assert np.isnan(s.loo["elpd"]) and np.isnan(s.waic["elpd"]) and np.isnan(s.dic["elpd"])
    assert_same(s, b)


def test_wrong_shapes_raise_named_errors():
    sc = StreamingScorer(3)
    with pytest.raises(ValueError, match=r"\(draws, 3\)"):
        sc.add(0, np.zeros((5, 4)))
    with pytest.raises(ValueError, match="numeric"):
        sc.add(0, np.array([["a", "b", "c"]]))
    with pytest.raises(ValueError, match="at least 2 draws"):
        sc.scores()
    with pytest.raises(ValueError, match="positive integer"):
        StreamingScorer(0)
    feed = Feeder(3)
    sc = StreamingScorer(3, reader=lambda a, b: np.zeros((7, b - a)), initial_k=4)
    sc.add(0, np.random.default_rng(0).normal(size=(300, 3)))
    with pytest.raises(ValueError, match="reader"):
        sc.scores()


def test_state_is_small_and_add_mostly_bypasses_the_buffer():
    rng = np.random.default_rng(4)
    n = 50
    sc = StreamingScorer(n, expected_draws=4000)
    for i in range(40):
        sc.add(i % 4, rng.normal(size=(100, n)))
    assert sc.state_nbytes() <= 3 * n * sc.k * 8
    assert sc.chains == 4 and sc.draws == 4000 and sc.chain_draws() == {0: 1000, 1: 1000, 2: 1000, 3: 1000}


def test_compaction_in_several_observation_blocks(monkeypatch):
    # the row compaction works in blocks of observations; force many small blocks
    import chainvigil.estimators.tail_buffer as tail_buffer

    monkeypatch.setattr(tail_buffer, "COMPACT_ELEMENTS", 64)
    rng = np.random.default_rng(5)
    ll = make_draws(rng, 2, 300, 40, 2.0, 5)
    feed = Feeder(40)
    sc = StreamingScorer(40, reader=feed.reader, initial_k=12)
    for start in range(0, 300, 25):
        for c in range(2):
            feed.parts.append(ll[c, start:start + 25])
            sc.add(c, ll[c, start:start + 25])
    assert_same(sc.scores(0.7), batch_scores(feed.all(), 0.7))


def test_scores_between_adds_leaves_the_buffer_intact():
    # scores() works on a copy of the buffer rows: partitioning them in place would move the +inf
    # padding in front of a row's fill mark and lose draws. Rows here fill unevenly (heavy tails),
    # and scores are taken after every block. Reference: batch_scores on the same draws.
    rng = np.random.default_rng(6)
    ll = make_draws(rng, 3, 300, 11, 1.0, 4)
    feed = Feeder(11)
    sc = StreamingScorer(11, reader=feed.reader, initial_k=40)
    for start in range(0, 300, 30):
        for c in range(3):
            feed.parts.append(ll[c, start:start + 30])
            sc.add(c, ll[c, start:start + 30])
            if sc.draws >= 2:
                sc.scores(0.9)
    assert len(set(sc._tail.fill.tolist())) > 1  # uneven fills were exercised
    assert_same(sc.scores(0.9), batch_scores(feed.all(), 0.9))


def test_blocks_larger_than_the_free_buffer_space_and_small_work_chunks(monkeypatch):
    # blocks of 250 draws with K = 6: candidates are appended in parts of at most cap - K draws;
    # add() and scores() are forced to work in many small observation chunks
    import chainvigil.estimators.streaming as streaming
    import chainvigil.estimators.tail_buffer as tail_buffer

    monkeypatch.setattr(streaming, "_ADD_ELEMENTS", 300)
    monkeypatch.setattr(tail_buffer, "SCORE_ELEMENTS", 30)
    monkeypatch.setattr(tail_buffer, "COMPACT_ELEMENTS", 50)
    rng = np.random.default_rng(7)
    ll = make_draws(rng, 2, 1000, 13, 3.0, 3)
    feed = Feeder(13)
    sc = StreamingScorer(13, reader=feed.reader, initial_k=6)
    for start in range(0, 1000, 250):
        for c in range(2):
            feed.parts.append(ll[c, start:start + 250])
            sc.add(c, ll[c, start:start + 250])
    assert_same(sc.scores(0.6), batch_scores(feed.all(), 0.6))
    assert sc.rebuilds == 1


def test_peak_memory_of_add_and_scores_within_three_n_k_doubles():
    # Issue 2 benchmark target, checked deterministically: peak traced memory (tracemalloc sees
    # numpy's allocations) while adding blocks and while scoring stays below 3 n K 8 bytes.
    import tracemalloc

    n, S = 4000, 4000
    rng = np.random.default_rng(8)
    pool = rng.normal(-1.0, 0.5, size=(1000, n))  # blocks are views of it (the caller's memory)
    tracemalloc.start()
    try:
        sc = StreamingScorer(n, expected_draws=S)
        for i in range(S // 100):
            j = (i * 100) % 1000
            sc.add(i % 4, pool[j:j + 100])
        _, peak_add = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        sc.scores(0.6)
        _, peak_scores = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    ref = 3 * n * sc.k * 8
    assert sc.rebuilds == 0
    assert peak_add <= ref, peak_add / ref
    assert peak_scores <= ref, peak_scores / ref


def test_failed_rebuild_recovers_from_the_reader_on_the_next_scores():
    # a reader that fails once (a store being written, say): scores() raises a clear error, later
    # blocks are still accepted, and the next scores() rebuilds and equals batch_scores again
    rng = np.random.default_rng(9)
    ll = make_draws(rng, 2, 600, 5, 2.0, 2)
    feed = Feeder(5)
    calls = {"fail": True}

    def reader(a, b):
        if calls["fail"]:
            calls["fail"] = False
            return np.zeros((3, b - a))  # wrong shape
        return feed.reader(a, b)

    sc = StreamingScorer(5, reader=reader, initial_k=10)
    for start in range(0, 300, 50):
        for c in range(2):
            feed.parts.append(ll[c, start:start + 50])
            sc.add(c, ll[c, start:start + 50])
    with pytest.raises(ValueError, match="reader"):
        sc.scores(0.7)
    for start in range(300, 600, 50):
        for c in range(2):
            feed.parts.append(ll[c, start:start + 50])
            sc.add(c, ll[c, start:start + 50])
    assert_same(sc.scores(0.7), batch_scores(feed.all(), 0.7))
    assert sc.rebuilds == 1


@pytest.mark.slow
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**32 - 1), per_chain=st.integers(20, 200), n=st.integers(8, 30),
       k0=st.integers(2, 30), chunk=st.integers(1, 200), bad=st.booleans())
def test_streaming_equals_batch_in_small_work_chunks(seed, per_chain, n, k0, chunk, bad):
    # add(), compaction and scores() split the observations into chunks of a few values (the
    # multi-chunk paths that the large benchmark takes), with NaN / -inf entries mixed in.
    # Reference: batch_scores on the same draws (docs/numerics.md, streaming invariant).
    import chainvigil.estimators.streaming as streaming
    import chainvigil.estimators.tail_buffer as tail_buffer

    saved = (streaming._ADD_ELEMENTS, tail_buffer.COMPACT_ELEMENTS, tail_buffer.SCORE_ELEMENTS)
    streaming._ADD_ELEMENTS, tail_buffer.COMPACT_ELEMENTS, tail_buffer.SCORE_ELEMENTS = chunk, chunk, chunk
    try:
        rng = np.random.default_rng(seed)
        ll = make_draws(rng, 2, per_chain, n, 2.0, 3)
        if bad:
            ll[1, rng.integers(per_chain), rng.integers(n)] = np.nan
            ll[0, rng.integers(per_chain), rng.integers(n)] = -np.inf
        feed = Feeder(n)
        sc = StreamingScorer(n, reader=feed.reader, initial_k=k0)
        pos = [0, 0]
        while pos[0] < per_chain or pos[1] < per_chain:
            c = int(rng.choice([i for i in range(2) if pos[i] < per_chain]))
            blk = ll[c, pos[c]:pos[c] + int(rng.integers(1, 60))]
            pos[c] += blk.shape[0]
            feed.parts.append(blk)
            sc.add(c, blk)
        r = rng.uniform(0.2, 1.2, n)
        assert_same(sc.scores(r), batch_scores(feed.all(), r))
    finally:
        streaming._ADD_ELEMENTS, tail_buffer.COMPACT_ELEMENTS, tail_buffer.SCORE_ELEMENTS = saved
