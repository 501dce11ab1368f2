"""WAIC (Watanabe 2010; Gelman, Hwang & Vehtari 2014)."""

import numpy as np
import pytest
from scipy.special import logsumexp

from chainvigil.estimators import waic
from chainvigil.estimators.loo import lse_columns
from _normal_model import exact_loo, loglik, posterior


def test_pointwise_matches_definition_with_scipy_logsumexp():
    # Source: scipy.special.logsumexp; definition lppd_i - var_s (ddof=1) (Gelman, Hwang & Vehtari 2014)
    rng = np.random.default_rng(0)
    ll = rng.normal(-3, 2, size=(2, 300, 17))
    out = waic(ll)
    flat = ll.reshape(-1, 17)
    ref = logsumexp(flat, axis=0) - np.log(600) - flat.var(axis=0, ddof=1)
    assert np.allclose(out["pointwise"], ref, rtol=1e-13)
    assert out["elpd"] == pytest.approx(ref.sum(), rel=1e-13)
    assert out["se"] == pytest.approx(np.sqrt(17 * ref.var(ddof=1)), rel=1e-12)
    assert out["p_eff"] == pytest.approx(flat.var(axis=0, ddof=1).sum(), rel=1e-12)


def test_lse_primitive_matches_scipy_including_extremes():
    # Source: scipy.special.logsumexp
    a = np.array([[1e3, -np.inf, -1e3, 0.0], [1e3 - 1, -np.inf, -1e3 - 800, 1.0], [-5, -np.inf, -2e3, 2.0]])
    with np.errstate(divide="ignore"):
        ref = logsumexp(a, axis=0)
    assert np.allclose(lse_columns(a), ref, rtol=1e-14)
    assert lse_columns(a)[1] == -np.inf


def test_normal_model_waic_close_to_exact_loo():
    # Source: closed-form LOO of the conjugate normal model (BDA3 ch. 2); WAIC and LOO are
    # asymptotically equivalent for a regular, well-specified model (Watanabe 2010).
    rng = np.random.default_rng(1)
    y = rng.normal(1.0, 2.0, 60)
    mu_n, tau_n = posterior(y, 2.0, 0.0, 10.0)
    mu = rng.normal(mu_n, tau_n, size=(4, 1000))
    out = waic(loglik(y, mu, 2.0))
    assert abs(out["elpd"] - exact_loo(y, 2.0, 0.0, 10.0).sum()) < 0.1


def test_bad_and_zero_likelihood_observations():
    # Source: definitions (our documented conventions): NaN -> bad, totals NaN; -inf -> elpd_i -inf
    rng = np.random.default_rng(2)
    ll = rng.normal(size=(200, 4))
    ll[5, 1] = np.nan
    out = waic(ll)
    assert out["bad_observations"] == [1] and np.isnan(out["elpd"]) and np.isnan(out["pointwise"][1])
    assert np.isfinite(out["pointwise"][[0, 2, 3]]).all()
    ll2 = rng.normal(size=(200, 4))
    ll2[7, 3] = -np.inf
    out2 = waic(ll2)
    assert out2["zero_likelihood_observations"] == [3]
    assert out2["pointwise"][3] == -np.inf and out2["elpd"] == -np.inf and out2["p_eff"] == np.inf


def test_wrong_shape_raises():
    with pytest.raises(ValueError, match="shape"):
        waic(np.zeros(10))
    with pytest.raises(ValueError, match="at least 2 draws"):
        waic(np.zeros((1, 5)))
