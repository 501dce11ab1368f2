"""Generalized Pareto fit (Zhang & Stephens 2009 with the prior of Vehtari et al. 2024) and quantiles."""

import numpy as np
import pytest
from scipy import stats

from chainvigil.estimators.pareto import fit_generalized_pareto, gpd_fit, gpd_quantile


@pytest.mark.parametrize("shape,seed", [(0.2, 11), (0.5, 12), (0.8, 13)])
def test_fit_recovers_scipy_genpareto_shape_and_matches_scipy_mle(shape, seed):
    # Source: scipy.stats.genpareto samples with known shape; scipy's genpareto.fit (MLE, floc=0)
    x = stats.genpareto.rvs(shape, scale=1.5, size=5000, random_state=seed)
    k, sigma = fit_generalized_pareto(x)
    assert abs(k - shape) < 0.05
    k_mle, _, s_mle = stats.genpareto.fit(x, floc=0)
    assert abs(k - k_mle) < 0.01
    assert abs(sigma / s_mle - 1) < 0.02


def test_vectorised_fit_with_ragged_lengths_equals_one_at_a_time():
    # Source: the same estimator applied row by row (pad + mask must not change any row)
    rng = np.random.default_rng(3)
    lens = [7, 40, 233, 1000]
    samples = [np.sort(stats.genpareto.rvs(0.4, size=m, random_state=rng)) for m in lens]
    X = np.zeros((len(lens), max(lens)))
    for i, s in enumerate(samples):
        X[i, : s.size] = s
        X[i, s.size:] = 1e9  # padding must be ignored
    k, sig = gpd_fit(X, lens)
    for i, s in enumerate(samples):
        k1, s1 = fit_generalized_pareto(s)
        assert k[i] == pytest.approx(k1, rel=1e-12, abs=1e-12)
        assert sig[i] == pytest.approx(s1, rel=1e-12)


def test_prior_shrinks_shape_toward_half_with_weight_ten():
    # Source: Vehtari et al. (2024), JMLR 25(72), Appendix: k <- (M k + 10 * 0.5) / (M + 10)
    x = np.sort(stats.genpareto.rvs(0.1, size=30, random_state=5))
    k_raw, _ = fit_generalized_pareto(x, prior=False)
    k_pri, _ = fit_generalized_pareto(x, prior=True)
    assert k_pri == pytest.approx((30 * k_raw + 5.0) / 40.0, rel=1e-12)


@pytest.mark.parametrize("k", [-0.3, 0.0, 0.2, 0.7, 1.5])
def test_quantile_matches_scipy_ppf(k):
    # Source: scipy.stats.genpareto.ppf
    p = np.linspace(0.001, 0.999, 57)
    assert np.allclose(gpd_quantile(p, k, 2.5), stats.genpareto.ppf(p, k, scale=2.5), rtol=1e-12)


def test_bad_samples_raise():
    with pytest.raises(ValueError, match="positive"):
        gpd_fit(np.zeros(10))
    with pytest.raises(ValueError, match="lengths"):
        gpd_fit(np.ones((2, 5)), [5])
