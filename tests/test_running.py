"""Mergeable streaming states and saving/restoring the streaming scorer.

Outside sources: numpy's two-pass mean and variance, scipy.special.logsumexp; the merge identity of
Chan, Golub & LeVeque (1983), eq. 1.5 (merging two states equals one pass over both blocks).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.special import logsumexp

from chainvigil.estimators import StreamingScorer, batch_scores
from chainvigil.estimators.running import RunningLogSumExp, RunningMoments


def _blocks(rng, sizes, k, scale=1.0, shift=0.0):
    return [rng.normal(shift, scale, size=(b, k)) for b in sizes]


@pytest.mark.parametrize("sizes", [(1,), (1, 1, 1), (5, 1, 17, 300), (1000, 3)])
def test_running_moments_equal_numpy_two_pass(sizes):
    rng = np.random.default_rng(1)
    blocks = _blocks(rng, sizes, 3, scale=1e3, shift=1e6)  # large offset: the naive formula fails here
    state = RunningMoments(3)
    for b in blocks:
        state.update(b)
    x = np.concatenate(blocks)
    got = state.result()
    assert got["count"] == x.shape[0]
    np.testing.assert_allclose(got["mean"], x.mean(axis=0), rtol=1e-12)  # numpy
    np.testing.assert_allclose(got["m2"], ((x - x.mean(axis=0)) ** 2).sum(axis=0), rtol=1e-9)
    np.testing.assert_array_equal(got["max"], x.max(axis=0))
    if x.shape[0] > 1:
        np.testing.assert_allclose(got["var"], x.var(axis=0, ddof=1), rtol=1e-9)


def test_running_moments_merge_equals_one_stream():
    rng = np.random.default_rng(2)
    a_blocks, b_blocks = _blocks(rng, (7, 30), 4), _blocks(rng, (1, 200, 5), 4, shift=3.0)
    one = RunningMoments(4)
    for blk in a_blocks + b_blocks:
        one.update(blk)
    a, b = RunningMoments(4), RunningMoments(4)
    for blk in a_blocks:
        a.update(blk)
    for blk in b_blocks:
        b.update(blk)
    merged = a.merge(b).result()
    ref = one.result()
    for key in ("mean", "m2", "max"):
        np.testing.assert_allclose(merged[key], ref[key], rtol=1e-12)
    assert merged["count"] == ref["count"]
    assert RunningMoments(4).merge(RunningMoments(4)).count == 0  # empty with empty stays empty


def test_merging_a_block_summary_equals_updating_with_the_block():
    # the scorer folds per-block summaries it computed itself (Chan, Golub & LeVeque 1983, eq. 1.5)
    rng = np.random.default_rng(5)
    blocks = _blocks(rng, (40, 7, 300), 3, scale=2.0, shift=-5.0)
    by_update, by_summary = RunningMoments(3), RunningMoments(3)
    lse_update, lse_summary = RunningLogSumExp(3), RunningLogSumExp(3)
    for x in blocks:
        by_update.update(x)
        mean = x.mean(axis=0)
        by_summary.merge_summary(x.shape[0], mean, ((x - mean) ** 2).sum(axis=0), x.max(axis=0))
        lse_update.update(x)
        shift = np.maximum(lse_summary.m, x.max(axis=0))  # the new running max, as the scorer passes
        lse_summary.merge_summary(shift, np.exp(x - shift).sum(axis=0))
    for key in ("mean", "m2", "max"):
        np.testing.assert_allclose(by_summary.result()[key], by_update.result()[key], rtol=1e-12)
    assert by_summary.count == by_update.count == 347
    x = np.concatenate(blocks)
    np.testing.assert_allclose(lse_summary.result(), logsumexp(x, axis=0), rtol=1e-13)  # scipy


def test_running_log_sum_exp_equals_scipy_and_merges():
    rng = np.random.default_rng(3)
    blocks = [rng.normal(0, 50, size=(b, 5)) for b in (3, 40, 1, 250)]
    blocks[2][0, 1] = 800.0  # a new maximum late in the stream: the rescale path
    x = np.concatenate(blocks)
    state = RunningLogSumExp(5)
    for b in blocks:
        state.update(b)
    np.testing.assert_allclose(state.result(), logsumexp(x, axis=0), rtol=1e-13)  # scipy
    a, b = RunningLogSumExp(5), RunningLogSumExp(5)
    for blk in blocks[:2]:
        a.update(blk)
    for blk in blocks[2:]:
        b.update(blk)
    np.testing.assert_allclose(a.merge(b).result(), logsumexp(x, axis=0), rtol=1e-13)
    only_neg_inf = RunningLogSumExp(1).update(np.array([-np.inf, -np.inf]))
    assert only_neg_inf.result()[0] == -np.inf  # log 0, as scipy gives
    restored = RunningLogSumExp.from_state(state.to_state())
    np.testing.assert_array_equal(restored.result(), state.result())


def _scores_close(a, b, tol=1e-9, *, skip=()):
    da, db = a.to_dict(json_safe=False), b.to_dict(json_safe=False)
    for key in ("loo", "waic", "dic"):
        for field, value in da[key].items():
            if f"{key}.{field}" in skip:
                continue
            if isinstance(value, str):
                assert value == db[key][field], f"{key}.{field}"
                continue
            np.testing.assert_allclose(value, db[key][field], rtol=tol, atol=tol, err_msg=f"{key}.{field}")
    np.testing.assert_allclose(da["pareto_k"]["values"], db["pareto_k"]["values"], rtol=tol, atol=tol)
    np.testing.assert_allclose(da["pointwise"]["loo"], db["pointwise"]["loo"], rtol=tol, atol=tol)


def test_scorer_saved_to_npz_and_restored_continues_like_the_uninterrupted_one(tmp_path):
    rng = np.random.default_rng(4)
    n = 30
    y = rng.normal(size=n)
    blocks = []
    for chain in ("a", "b"):
        for size in (150, 90, 400):
            mu = rng.normal(0, 0.4, size=(size, 1))
            blocks.append((chain, -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, :] - mu) ** 2))
    history = {c: [] for c in ("a", "b")}

    def reader(start, stop):
        return np.concatenate([blk for c in ("a", "b") for blk in history[c]])[:, start:stop]

    whole = StreamingScorer(n, n_params=1, point_loglik=-40.0, initial_k=16, reader=reader)
    part = StreamingScorer(n, n_params=1, point_loglik=-40.0, initial_k=16, reader=reader)
    for chain, blk in blocks[:3]:
        whole.add(chain, blk)
        part.add(chain, blk)
        history[chain].append(blk)
    path = tmp_path / "scorer.npz"
    np.savez(path, **part.to_state())
    with np.load(path, allow_pickle=False) as saved:
        restored = StreamingScorer.from_state(dict(saved), reader=reader)
    for chain, blk in blocks[3:]:
        whole.add(chain, blk)
        restored.add(chain, blk)
        history[chain].append(blk)
    assert restored.draws == whole.draws and restored.chain_draws() == whole.chain_draws()
    _scores_close(restored.scores(), whole.scores())
    # ... and both still equal the batch result on all draws (the scorer's invariant).
    pooled = np.concatenate([blk for _c, blk in blocks])[None]
    # the batch loo.mcse is the joint MCSE, which needs every draw; the streaming path reports the
    # quadrature value, which batch keeps as loo.mcse_independent (docs/numerics.md)
    batch = batch_scores(pooled, r_eff=1.0, n_params=1, point_loglik=-40.0)
    _scores_close(whole.scores(), batch, skip=("loo.mcse", "loo.mcse_method"))
    assert whole.scores().loo["mcse"] == pytest.approx(batch.loo["mcse_independent"], rel=1e-9)
