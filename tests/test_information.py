"""AIC (Akaike 1974) and DIC (Spiegelhalter et al. 2002; variance penalty of Gelman et al. 2013)."""

import numpy as np
import pytest
from scipy import stats

from _normal_model import loglik, posterior
from chainvigil.estimators import aic, dic


def _normal_fit(seed=0, n=200, sigma=1.0, S=8000):
    rng = np.random.default_rng(seed)
    y = rng.normal(0.3, sigma, n)
    mu_n, tau_n = posterior(y, sigma, 0.0, 100.0)
    mu = rng.normal(mu_n, tau_n, size=(4, S // 4))
    return y, loglik(y, mu, sigma)


def test_aic_uses_best_draw_or_supplied_maximum():
    # Source: Akaike (1974): max log-likelihood - k; the MLE of a normal mean is the sample mean
    y, ll = _normal_fit()
    mle = stats.norm.logpdf(y, y.mean(), 1.0).sum()
    best = ll.reshape(-1, y.size).sum(axis=1).max()
    out = aic(ll, n_params=1)
    assert out["elpd"] == pytest.approx(best - 1.0, rel=1e-12) and out["p_eff"] == 1.0
    assert best <= mle + 1e-9 and mle - best < 0.01  # the best of 8000 posterior draws is near the MLE
    assert aic(ll, n_params=1, point_loglik=mle)["elpd"] == pytest.approx(mle - 1.0)
    assert aic(ll, n_params=None) is None


def test_dic_penalty_is_number_of_parameters_for_normal_posterior():
    # Source: BDA3 sec. 7.2: p_DIC = 2 var(log p(y|theta)); with a normal posterior the total
    # log-likelihood is const - chi2_1 / 2, whose variance is 1/2, so p_DIC -> 1
    y, ll = _normal_fit(seed=1)
    out = dic(ll)
    assert out["p_eff"] == pytest.approx(1.0, rel=0.1)
    T = ll.reshape(-1, y.size).sum(axis=1)
    assert out["p_eff"] == pytest.approx(2 * T.var(ddof=1), rel=1e-12)
    assert out["elpd"] == pytest.approx(T.mean() - T.var(ddof=1), rel=1e-12)
    point = stats.norm.logpdf(y, y.mean(), 1.0).sum()
    assert dic(ll, point_loglik=point)["elpd"] == pytest.approx(point - 2 * T.var(ddof=1), rel=1e-12)
    # the two forms agree to first order: mean T = log p(y | theta_hat) - p/2 (BDA3 sec. 7.2)
    assert abs(out["elpd"] - dic(ll, point_loglik=point)["elpd"]) < 0.2


def test_bad_input_conventions():
    ll = np.random.default_rng(2).normal(size=(100, 3))
    ll[4, 0] = np.nan
    assert np.isnan(dic(ll)["elpd"]) and np.isnan(aic(ll, 2)["elpd"])
    ll[4, 0] = -np.inf
    assert dic(ll)["elpd"] == -np.inf and dic(ll)["p_eff"] == np.inf
    assert np.isfinite(aic(ll, 2)["elpd"])  # the best draw has every value finite
    with pytest.raises(ValueError, match="shape"):
        dic(np.zeros(5))
