"""Tests of chainvigil.estimators.reff_stream (streaming r_eff) against outside references.

Outside references:
* AR(1) closed form: a stationary AR(1) with coefficient rho has integrated autocorrelation time
  tau = (1 + rho) / (1 - rho), so ESS / S -> (1 - rho) / (1 + rho) (standard time-series result,
  e.g. Geyer 1992, Statistical Science 7(4), Sec. 3).  With loglik = log(10 + x) the likelihood
  exp(loglik) = 10 + x is that AR(1) itself (r_eff is invariant to shifting and scaling).
* The full FFT autocorrelation estimate ``relative_efficiency`` on the same draws (Geyer's initial
  monotone sequence), for a likelihood that is a non-linear function of the chain.

Tolerance: both estimators are noisy per observation (with 4 x 1,500 draws each has a relative sd
of roughly 10-15% here), so agreement is asserted on the mean over 300 independent observations
within 15%, and on the median per-observation difference within 25%.  Batch means differ from the
autocorrelation sum systematically only through the finite batch size (an O(1/b) bias that the
lugsail step removes to first order, see the module docstring) and the max() that keeps the
variance at least the plain batch-means one (about 5% low at rho 0.5); over 8 seeds the mean over
observations stayed within 0.93-1.08 of the closed form and 0.93-1.06 of the full estimate, and the
median per-observation difference at or below 0.14, inside 15% and 25%.
"""

import math

import numpy as np
import pytest
from scipy import signal

from chainvigil.estimators.mixing import finite_relative_efficiency, relative_efficiency
from chainvigil.estimators.reff_stream import StreamingRelativeEfficiency

CHAINS, DRAWS, N_OBS, BLOCK = 4, 1500, 300, 100


def ar1(rng, chains, draws, n, rho, burn=500):
    """Stationary unit-variance Gaussian AR(1) series, (chains, draws, n)."""
    e = rng.normal(size=(chains, draws + burn, n)) * math.sqrt(1 - rho**2)
    return signal.lfilter([1.0], [1.0, -rho], e, axis=1)[:, burn:]


def stream(loglik, block=BLOCK, **kw):
    est = StreamingRelativeEfficiency(loglik.shape[2], **kw)
    for c in range(loglik.shape[0]):
        for start in range(0, loglik.shape[1], block):
            est.update(c, loglik[c, start:start + block])
    return est


@pytest.mark.parametrize("rho", [0.5, 0.8, 0.95])
def test_ar1_likelihood_matches_closed_form_and_full_estimate(rho):
    x = ar1(np.random.default_rng(int(rho * 100)), CHAINS, DRAWS, N_OBS, rho)
    loglik = np.log(10.0 + x)  # exp(loglik) is the AR(1) itself
    r = stream(loglik).result()
    closed_form = (1 - rho) / (1 + rho)  # AR(1): ESS/S -> (1-rho)/(1+rho)
    assert r.mean() == pytest.approx(closed_form, rel=0.15)
    full = relative_efficiency(loglik)
    assert r.mean() == pytest.approx(full.mean(), rel=0.15)
    assert np.median(np.abs(r / full - 1)) < 0.25


@pytest.mark.parametrize("rho", [0.5, 0.8, 0.95])
def test_nonlinear_likelihood_matches_full_estimate(rho):
    x = ar1(np.random.default_rng(7 + int(rho * 100)), CHAINS, DRAWS, N_OBS, rho)
    loglik = -0.5 * (x - 0.3) ** 2  # a normal likelihood as a function of the chain's parameter
    r = stream(loglik).result()
    full = relative_efficiency(loglik)  # the full autocorrelation estimate on the same draws
    assert r.mean() == pytest.approx(full.mean(), rel=0.15)
    assert np.median(np.abs(r / full - 1)) < 0.25
    # the likelihood is less autocorrelated than the chain (rho^2 for its quadratic part)
    assert r.mean() > (1 - rho) / (1 + rho)


def test_independent_draws_give_about_one():
    # i.i.d. draws: ESS = S, r_eff = 1 (definition of ESS)
    loglik = np.random.default_rng(3).normal(size=(CHAINS, 2000, 200))
    r = stream(loglik).result()
    assert r.mean() == pytest.approx(1.0, rel=0.1)


def test_chains_that_disagree_lower_r_eff():
    # two chains stuck around different values: the between-chain spread must show up as a low r_eff,
    # as it does in the full estimate (var+ with the between-chain term B/N)
    rng = np.random.default_rng(4)
    x = ar1(rng, CHAINS, DRAWS, 50, 0.5)
    x[:2] += 2.0
    loglik = np.log(10.0 + x)
    r, full = stream(loglik).result(), relative_efficiency(loglik)
    assert r.max() < 0.1 and full.max() < 0.1


def test_merge_equals_sequential_update():
    rng = np.random.default_rng(5)
    loglik = np.log(10.0 + ar1(rng, CHAINS, 700, 20, 0.8))
    loglik[2, :, 3] += 40.0  # a larger maximum in a later chain forces a rescale on merge
    together = stream(loglik, block=37)
    first, second = StreamingRelativeEfficiency(20), StreamingRelativeEfficiency(20)
    for c in range(CHAINS):
        target = first if c < 2 else second
        for start in range(0, 700, 53):
            target.update(c, loglik[c, start:start + 53])
    merged = first.merge(second)
    np.testing.assert_allclose(merged.result(), together.result(), rtol=1e-10)
    assert merged.draws == together.draws == CHAINS * 700
    with pytest.raises(ValueError, match="both hold chain"):
        merged.merge(second)


def test_block_sizes_do_not_matter():
    loglik = np.log(10.0 + ar1(np.random.default_rng(6), 2, 999, 10, 0.8))
    a, b = stream(loglik, block=1), stream(loglik, block=250)
    np.testing.assert_allclose(a.result(), b.result(), rtol=1e-10)


def test_state_round_trip_through_npz(tmp_path):
    loglik = np.log(10.0 + ar1(np.random.default_rng(8), 3, 500, 15, 0.8))
    loglik[1, 10, 2] = np.nan
    est = stream(loglik[:, :321])
    path = tmp_path / "reff.npz"
    np.savez(path, **est.to_state())
    with np.load(path, allow_pickle=False) as f:
        back = StreamingRelativeEfficiency.from_state(dict(f))
    np.testing.assert_array_equal(back.result(), est.result())
    for c in range(3):  # both go on identically
        est.update(c, loglik[c, 321:])
        back.update(c, loglik[c, 321:])
    np.testing.assert_array_equal(back.result(), est.result())
    bad = est.to_state()
    del bad["m2"]
    with pytest.raises(ValueError, match="missing key"):
        StreamingRelativeEfficiency.from_state(bad)
    bad = est.to_state()
    bad["count"] = bad["count"] + 1
    with pytest.raises(ValueError, match="inconsistent"):
        StreamingRelativeEfficiency.from_state(bad)


def test_memory_does_not_grow_with_draws():
    rng = np.random.default_rng(9)
    est = StreamingRelativeEfficiency(5, batches=8)
    sizes = {}
    for total in range(1000, 100_001, 1000):
        for c in range(2):
            est.update(c, rng.normal(size=(1000, 5)))
        if total in (1000, 100_000):
            sizes[total] = sum(a.nbytes for a in est.to_state().values())
    assert sizes[1000] == sizes[100_000]
    assert est.draws == 200_000
    assert all(c.batch_size > 1000 for c in est.chains.values())  # the batches did merge


def test_constant_columns_and_non_finite_values_as_the_full_estimate():
    rng = np.random.default_rng(10)
    loglik = np.log(10.0 + ar1(rng, CHAINS, 400, 6, 0.5))
    loglik[:, :, 0] = -1.25  # constant likelihood
    loglik[1, 17, 1] = -np.inf  # zero likelihood in one draw
    loglik[3, 200, 2] = np.nan
    loglik[0, 5, 3] = np.inf
    full = finite_relative_efficiency(loglik)
    r = stream(loglik).result()
    np.testing.assert_array_equal(r[:4], full[:4])
    np.testing.assert_array_equal(r[:4], 1.0)
    assert np.all(np.isfinite(r)) and r[4:].min() > 0.2


def test_all_minus_inf_column_and_few_draws():
    est = StreamingRelativeEfficiency(3)
    block = np.zeros((3, 3))
    block[:, 1] = -np.inf
    est.update("a", block)
    np.testing.assert_array_equal(est.result(), 1.0)  # fewer than 4 draws: 1 (as the full estimate)
    est.update("a", np.random.default_rng(0).normal(size=(50, 3)))
    r = est.result()
    assert r[1] == 1.0 and np.isfinite(r).all()  # a non-finite value was seen: 1 from then on


def test_chains_of_different_lengths_and_a_late_chain():
    # chains may have different lengths (the service's chains grow at their own pace); the result is
    # still the AR(1) value (closed form (1-rho)/(1+rho)), and a chain that just started (< 4 draws)
    # makes every r_eff 1, as the full estimate does below 4 draws per chain
    rho = 0.8
    x = ar1(np.random.default_rng(12), 3, 2000, 200, rho)
    est = StreamingRelativeEfficiency(200)
    for c, length in enumerate((2000, 1400, 900)):
        for start in range(0, length, 100):
            est.update(c, np.log(10.0 + x[c, start:min(length, start + 100)]))
    assert est.result().mean() == pytest.approx((1 - rho) / (1 + rho), rel=0.15)
    est.update("late", np.zeros((3, 200)))
    np.testing.assert_array_equal(est.result(), 1.0)


def test_bad_input_is_refused_with_a_clear_message():
    est = StreamingRelativeEfficiency(4)
    with pytest.raises(ValueError, match=r"expected a block shaped \(draws, 4\), got \(10, 3\)"):
        est.update("a", np.zeros((10, 3)))
    with pytest.raises(ValueError, match="n must be at least 1"):
        StreamingRelativeEfficiency(0)
    with pytest.raises(ValueError, match="n/B differ"):
        est.merge(StreamingRelativeEfficiency(4, batches=4))
