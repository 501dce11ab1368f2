"""Blocks of observations on several threads give the same numbers as one thread."""
import numpy as np
import pytest

from chainvigil.estimators import StreamingScorer, _blocks


def test_every_block_is_visited_once():
    seen = []
    _blocks.for_each_block(103, 10, lambda a, b: seen.append((a, b)), threads=3)
    assert sorted(seen) == [(a, min(103, a + 10)) for a in range(0, 103, 10)]


def test_an_error_in_a_block_reaches_the_caller():
    def work(a, b):
        if a == 20:
            raise ValueError("block 20 failed")
    with pytest.raises(ValueError, match="block 20"):
        _blocks.for_each_block(50, 10, work, threads=2)


def test_streaming_scores_do_not_depend_on_threads(monkeypatch):
    rng = np.random.default_rng(3)
    ll = rng.standard_t(4, size=(800, 3000)) - 2.0
    scorer = StreamingScorer(3000, reader=lambda a, b: ll[:, a:b])
    for i in range(0, 800, 80):
        scorer.add(f"c{i % 3}", ll[i:i + 80])
    monkeypatch.setattr(_blocks, "THREADS", 1)
    one = scorer.scores(0.7)
    monkeypatch.setattr(_blocks, "THREADS", 3)
    three = scorer.scores(0.7)
    np.testing.assert_array_equal(one.loo_pointwise, three.loo_pointwise)
    np.testing.assert_array_equal(one.pareto_k, three.pareto_k)


def test_relative_efficiency_does_not_depend_on_threads(monkeypatch):
    from chainvigil.estimators import relative_efficiency

    rng = np.random.default_rng(4)
    ll = rng.normal(size=(3, 200, 5000)) * 0.3 - 1.0
    monkeypatch.setattr(_blocks, "THREADS", 1)
    one = relative_efficiency(ll)
    monkeypatch.setattr(_blocks, "THREADS", 2)
    np.testing.assert_array_equal(one, relative_efficiency(ll))


def test_blocks_inside_blocks_run_without_deadlock():
    inner = []

    def outer(a, b):
        _blocks.for_each_block(4, 1, lambda x, y: inner.append((a, x)), threads=2)

    _blocks.for_each_block(8, 1, outer, threads=2)
    assert len(inner) == 32
