"""PSIS (Vehtari, Simpson, Gelman, Yao & Gabry 2024) and PSIS-LOO (Vehtari, Gelman & Gabry 2017)."""

import numpy as np
import pytest
from scipy import stats
from scipy.special import logsumexp

from _normal_model import ar1_draws, exact_loo, loglik, posterior
from chainvigil.estimators import batch_scores, psis, psis_loo, sample_size_threshold, tail_length
from chainvigil.estimators.mixing import ess, relative_efficiency


def test_tail_length_and_threshold_formulas():
    # Source: Vehtari et al. (2024), JMLR 25(72), sec. 3: M = ceil(min(S/5, 3 sqrt(S/r_eff)));
    # threshold min(1 - 1/log10 S, 0.7)
    assert tail_length(100)[0] == 20
    assert tail_length(4000)[0] == int(np.ceil(3 * np.sqrt(4000)))
    assert tail_length(4000, 0.25)[0] == int(np.ceil(6 * np.sqrt(4000)))
    assert sample_size_threshold(100) == pytest.approx(0.5)
    assert sample_size_threshold(10_000) == 0.7


def test_psis_k_hat_of_pareto_distributed_ratios():
    # Source: threshold stability of the generalized Pareto (exceedances of a GPD are GPD with the
    # same shape; Coles 2001, Thm 4.1 (from memory)), samples from scipy.stats.genpareto.
    # Checked on the paths production uses: psis_loo (the scorers' k-hat, via loo_from_parts) with
    # ratios w = exp(-ll), and psis (the weights of the joint MCSE).
    for k_true, seed in [(0.3, 1), (0.7, 2)]:
        w = stats.genpareto.rvs(k_true, size=(20000, 3), random_state=seed)
        k_loo = psis_loo(-np.log(w), 1.0)["pareto_k"]
        assert np.all(np.abs(k_loo - k_true) < 0.15)
        _, k = psis(np.log(w))
        assert np.array_equal(k, k_loo)


def test_psis_loo_equals_estimate_from_smoothed_weights():
    # Source: definition elpd_i = log sum w p / sum w and the self-normalised IS variance
    # sum wbar^2 (p - E)^2 / r_eff with the delta method (Vehtari, Gelman & Gabry 2017), computed
    # directly from the weights with scipy.special.logsumexp
    rng = np.random.default_rng(4)
    ll = rng.standard_t(4, size=(1500, 12)) * 0.8 - 2.0
    r = rng.uniform(0.4, 1.0, 12)
    out = psis_loo(ll, r)
    lw, k = psis(-ll, r)
    ref = logsumexp(lw + ll, axis=0) - logsumexp(lw, axis=0)
    assert np.allclose(out["pointwise"], ref, rtol=1e-12)
    assert np.array_equal(k, out["pareto_k"])
    wbar = np.exp(lw - logsumexp(lw, axis=0))
    E = np.exp(ref)
    var = (wbar**2 * (np.exp(ll) - E) ** 2).sum(axis=0) / r
    assert np.allclose(out["mcse_pointwise"], np.sqrt(var) / E, rtol=1e-9)
    assert out["mcse_independent"] == pytest.approx(np.sqrt(np.sum(var / E**2)), rel=1e-9)
    # joint MCSE of the total, written out from its definition (docs/numerics.md): one chain here,
    # a_s = sum_i wbar_is (p_is - E_i)/E_i and MCSE^2 = sum_s a_s^2 / r_a, r_a = ESS(a)/S
    a = (wbar * (np.exp(ll) - E) / E).sum(axis=1)
    r_a = np.clip(ess(a[None, :]) / 1500, 1 / 1500, np.log10(1500))
    assert out["mcse_method"] == "joint"
    assert out["mcse"] == pytest.approx(np.sqrt(np.sum(a**2) / r_a), rel=1e-9)
    lppd = logsumexp(ll, axis=0) - np.log(1500)
    assert out["p_eff"] == pytest.approx(lppd.sum() - ref.sum(), rel=1e-9)


def test_smoothed_tail_is_truncated_at_the_largest_raw_ratio():
    # Source: Vehtari et al. (2024), sec. 3 (truncation at the largest raw weight)
    rng = np.random.default_rng(5)
    r = stats.genpareto.rvs(0.9, size=(3000, 4), random_state=rng)
    lr = np.log(r)
    lw, _ = psis(lr)
    # body draws keep their raw ratio, so the smallest ratio gives the normalising constant
    i0 = np.argmin(lr, axis=0)
    cols = np.arange(4)
    unnorm = lw - (lw[i0, cols] - lr[i0, cols])
    assert np.all(unnorm.max(axis=0) <= lr.max(axis=0) + 1e-9)
    # and the smoothing changed only the M largest ratios (Vehtari et al. 2024, sec. 3)
    M = tail_length(3000)[0]
    changed = ~np.isclose(unnorm, lr, rtol=0, atol=1e-9)
    assert np.all(changed.sum(axis=0) <= M)


def test_normal_model_exact_draws_match_closed_form_loo():
    # Source: conjugate normal model, closed-form LOO predictive (Gelman et al., BDA3 ch. 2)
    rng = np.random.default_rng(10)
    y = rng.normal(0.5, 1.5, 40)
    mu_n, tau_n = posterior(y, 1.5, 0.0, 5.0)
    mu = rng.normal(mu_n, tau_n, size=(4, 1000))
    out = psis_loo(loglik(y, mu, 1.5), 1.0)
    exact = exact_loo(y, 1.5, 0.0, 5.0)
    assert abs(out["elpd"] - exact.sum()) < 3 * out["mcse"] + 0.02
    assert np.all(np.abs(out["pointwise"] - exact) < 3 * out["mcse_pointwise"] + 0.02)
    assert out["pareto_k"].max() < 0.5


def test_normal_model_ar1_draws_with_computed_r_eff():
    # Source: as above (BDA3 ch. 2); AR(1) posterior draws, r_eff computed from the chains
    rng = np.random.default_rng(11)
    y = rng.normal(-1.0, 1.0, 30)
    mu_n, tau_n = posterior(y, 1.0, 0.0, 10.0)
    mu = ar1_draws(mu_n, tau_n, 4, 1500, 0.8, rng)
    ll = loglik(y, mu, 1.0)
    sc = batch_scores(ll)  # r_eff=None -> relative_efficiency
    assert np.allclose(sc.r_eff, relative_efficiency(ll))
    assert np.all(sc.r_eff < 0.5)  # AR(1), rho = 0.8: ESS/S near (1 - rho)/(1 + rho) = 0.11
    exact = exact_loo(y, 1.0, 0.0, 10.0).sum()
    assert abs(sc.loo["elpd"] - exact) < 3 * sc.loo["mcse"] + 0.02
    assert abs(sc.waic["elpd"] - exact) < 0.1


def test_regression_effective_parameters_near_p():
    # Fact of the trade: for a regular model, many observations and weak priors, the WAIC and LOO
    # effective numbers of parameters approach p (AIC's penalty). Exact conjugate posterior draws
    # of a linear regression with known sigma and prior beta ~ N(0, 100^2 I).
    rng = np.random.default_rng(12)
    n, p, sigma = 1000, 4, 1.3
    X = np.column_stack([np.ones(n), rng.normal(size=(n, p - 1))])
    y = X @ np.array([0.5, -1.0, 2.0, 0.3]) + rng.normal(0, sigma, n)
    prec = X.T @ X / sigma**2 + np.eye(p) / 100**2
    cov = np.linalg.inv(prec)
    mean = cov @ (X.T @ y) / sigma**2
    beta = rng.multivariate_normal(mean, cov, size=2000)
    ll = stats.norm.logpdf(y[None, :], beta @ X.T, sigma)
    loo = psis_loo(ll, 1.0)
    assert loo["p_eff"] == pytest.approx(p, rel=0.15)
    sc = batch_scores(ll, 1.0, n_params=p)
    assert sc.waic["p_eff"] == pytest.approx(p, rel=0.15)
    assert sc.dic["p_eff"] == pytest.approx(p, rel=0.15)  # 2 var(chi2_p / 2) = p (BDA3 sec. 7.2)


def test_gross_outlier_gets_the_largest_k_hat_and_influential_point_exceeds_0_7():
    # Fact of the trade: a point the model finds very surprising gets a large k-hat
    rng = np.random.default_rng(13)
    y = rng.normal(0, 1, 30)
    y[17] = 9.0
    mu_n, tau_n = posterior(y, 1.0, 0.0, 10.0)
    out = psis_loo(loglik(y, rng.normal(mu_n, tau_n, (4, 1000)), 1.0), 1.0)
    assert int(np.argmax(out["pareto_k"])) == 17
    # very few observations, one of them decisive: leaving it out moves the posterior far
    y2 = np.array([0.1, -0.2, 30.0])
    m2, t2 = posterior(y2, 1.0, 0.0, 100.0)
    out2 = psis_loo(loglik(y2, rng.normal(m2, t2, (4, 1000)), 1.0), 1.0)
    assert out2["pareto_k"][2] > 0.7 and int(np.argmax(out2["pareto_k"])) == 2


def test_edge_cases_documented():
    rng = np.random.default_rng(14)
    ll = rng.normal(-1, 0.5, size=(400, 5))
    ll[:, 0] = -2.25  # constant column: no tail, k-hat -inf, elpd exact
    ll[3, 1] = np.nan  # bad observation
    ll[9, 2] = -np.inf  # likelihood zero in one draw
    out = psis_loo(ll, 1.0)
    assert out["pareto_k"][0] == -np.inf and out["flat_tail_observations"] == [0]
    assert out["pointwise"][0] == pytest.approx(-2.25, rel=1e-13)  # exact: E = exp(-2.25)
    assert out["pareto_k"][1] == np.inf and np.isnan(out["pointwise"][1])
    assert out["bad_observations"] == [1]
    assert np.isnan(out["elpd"]) and np.isnan(out["se"]) and np.isnan(out["mcse"])
    assert out["pareto_k"][2] == np.inf and out["pointwise"][2] == -np.inf
    assert out["zero_likelihood_observations"] == [2]
    assert np.isfinite(out["pareto_k"][3:]).all()


def test_too_few_draws_flags_and_uses_raw_ratios():
    # Source: with raw ratios the IS estimate is the harmonic mean of p: elpd_i = log S - lse(-ll)
    # (Gelfand, Dey & Chang 1992 (from memory)); k-hat +inf by our documented convention
    rng = np.random.default_rng(15)
    ll = rng.normal(-1, 0.3, size=(20, 3))
    out = psis_loo(ll, 1.0)
    assert out["too_few_draws"] and np.all(out["pareto_k"] == np.inf)
    assert np.allclose(out["pointwise"], np.log(20) - logsumexp(-ll, axis=0), rtol=1e-13)


def test_wrong_shapes_and_r_eff_raise():
    with pytest.raises(ValueError, match="shape"):
        psis_loo(np.zeros((2, 3, 4, 5)))
    with pytest.raises(ValueError, match="r_eff"):
        psis_loo(np.zeros((50, 3)), np.ones(4))
    with pytest.raises(ValueError, match="r_eff"):
        psis_loo(np.zeros((50, 3)), -1.0)
