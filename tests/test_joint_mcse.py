"""The joint MCSE of the PSIS-LOO total (chainvigil.estimators.loo.joint_mcse, docs/numerics.md).

Outside reference: the observed spread of the estimates over repeated, independent posterior
samples of a conjugate normal model whose posterior is known in closed form (Gelman et al., BDA3
ch. 2); the exact LOO values of the same model (BDA3 ch. 2) check that the spread is around the
truth.
"""

import math

import numpy as np
import pytest
from scipy.signal import lfilter

from _normal_model import exact_loo, loglik, posterior
from chainvigil.estimators import batch_scores, psis_loo
from chainvigil.estimators.compare import compare_runs
from chainvigil.estimators.loo import joint_mcse, joint_mcse_finish, joint_mcse_parts
from chainvigil.estimators.mixing import relative_efficiency

CHAINS, DRAWS, N, REPLICATES = 4, 250, 20, 200


def posterior_draws(mean, sd, rho, rng, chains=CHAINS, draws=DRAWS):
    """(chains, draws) exact posterior draws: iid (rho = 0) or a stationary AR(1) with that lag-1
    correlation (marginal N(mean, sd^2) at every step)."""
    e = rng.standard_normal((chains, draws))
    if rho == 0:
        return mean + sd * e
    e[:, 0] /= math.sqrt(1 - rho * rho)
    return mean + sd * math.sqrt(1 - rho * rho) * lfilter([1.0], [1.0, -rho], e, axis=1)


_REPLICATES: dict = {}


def replicate_loo(y, sigma, rho, seed):
    """elpd_loo, its joint MCSE and its independent-sum MCSE over REPLICATES posterior samples
    (computed once per data, sigma, rho and seed; the tests only read them)."""
    key = (y.tobytes(), sigma, rho, seed)
    if key not in _REPLICATES:
        _REPLICATES[key] = _replicate_loo(y, sigma, rho, seed)
        _REPLICATES[key].setflags(write=False)
    return _REPLICATES[key]


def _replicate_loo(y, sigma, rho, seed):
    rng = np.random.default_rng(seed)
    mu_n, tau_n = posterior(y, sigma, 0.0, 3.0)
    out = np.empty((REPLICATES, 3))
    for j in range(REPLICATES):
        ll = loglik(y, posterior_draws(mu_n, tau_n, rho, rng), sigma)
        r_eff = relative_efficiency(ll) if rho else 1.0
        o = psis_loo(ll, r_eff)
        out[j] = o["elpd"], o["mcse"], o["mcse_independent"]
    return out


@pytest.fixture(scope="module")
def data():
    return np.random.default_rng(2026).normal(0.3, 1.0, N)


@pytest.mark.parametrize("rho", [0.0, 0.8], ids=["independent", "ar1"])
def test_joint_mcse_matches_the_spread_of_repeated_estimates(data, rho):
    # reference: SD of elpd_loo over 200 independent posterior samples (closed-form posterior)
    res = replicate_loo(data, 1.0, rho, seed=11 if rho else 10)
    spread = res[:, 0].std(ddof=1)
    ratio = spread / res[:, 1].mean()
    print(f"\nrho={rho}: sd {spread:.4f}, joint {res[:, 1].mean():.4f} (ratio {ratio:.2f}), "
          f"independent {res[:, 2].mean():.4f} (ratio {spread / res[:, 2].mean():.2f})")
    assert 0.8 <= ratio <= 1.2
    # the estimates scatter around the exact LOO total (BDA3 ch. 2), within 3 standard errors of
    # the mean of 200 replicates plus a small allowance for the PSIS bias
    exact = exact_loo(data, 1.0, 0.0, 3.0).sum()
    assert abs(res[:, 0].mean() - exact) < 3 * spread / math.sqrt(REPLICATES) + 0.01
    if rho == 0:
        # the sum of independent pointwise errors understates the spread (the draws are shared)
        assert spread / res[:, 2].mean() > 1.3


# independent draws: slow only (the AR(1) case checks the same sum of squares with r_eff < 1, and
# test_compare.py the formula itself)
@pytest.mark.parametrize("rho", [pytest.param(0.0, marks=pytest.mark.slow), 0.8], ids=["independent", "ar1"])
def test_delta_mcse_of_two_runs_matches_the_spread_of_repeated_differences(data, rho):
    # two models of the same data (sigma 1 and sigma 1.4), each with its own independent draws:
    # MCSE(Delta) = sqrt(MCSE_a^2 + MCSE_b^2) from compare_runs; reference: SD of Delta over
    # 200 replicates. Model a's replicates are those of the test above (same seed, computed once).
    a = replicate_loo(data, 1.0, rho, seed=11 if rho else 10)
    b = replicate_loo(data, 1.4, rho, seed=21)
    delta = b[:, 0] - a[:, 0]
    rows = [compare_runs({"a": np.full(N, a[j, 0] / N), "b": np.full(N, b[j, 0] / N)},
                         {"a": a[j, 1], "b": b[j, 1]}) for j in range(0, REPLICATES, 20)]
    assert all(r[1]["mcse_delta"] == pytest.approx(math.hypot(a[j, 1], b[j, 1]))
               for r, j in zip(rows, range(0, REPLICATES, 20)))
    ratio = delta.std(ddof=1) / np.hypot(a[:, 1], b[:, 1]).mean()
    print(f"\nrho={rho}: Delta sd / mean MCSE(Delta) = {ratio:.2f}")
    assert 0.8 <= ratio <= 1.2


def test_blocks_of_observations_add_up_to_the_whole():
    # the per-draw parts of disjoint observation blocks add (a_s is a sum over observations), so a
    # caller streaming blocks from a store gets the value of the one-shot function
    rng = np.random.default_rng(3)
    y = rng.normal(size=37)
    mu_n, tau_n = posterior(y, 1.0, 0.0, 3.0)
    ll = loglik(y, posterior_draws(mu_n, tau_n, 0.5, rng, draws=300), 1.0)
    r_eff = relative_efficiency(ll)
    parts = sum(joint_mcse_parts(ll[:, :, a:a + 10], r_eff[a:a + 10]) for a in range(0, 37, 10))
    assert parts.shape == (CHAINS, 300)
    assert joint_mcse_finish(parts) == pytest.approx(joint_mcse(ll, r_eff), rel=1e-12)
    assert joint_mcse(ll, r_eff) == pytest.approx(psis_loo(ll, r_eff)["mcse"], rel=1e-12)
    # sum_s a_s = 0: E_i is the weighted mean of p_is
    assert abs(parts.sum()) < 1e-9 * np.abs(parts).sum()


def test_edge_cases_follow_the_loo_conventions():
    rng = np.random.default_rng(4)
    ll = rng.normal(-1, 0.3, size=(2, 100, 4))
    ll[0, 5, 1] = -np.inf
    assert joint_mcse(ll) == math.inf and psis_loo(ll)["mcse"] == math.inf
    ll[1, 7, 2] = np.nan
    assert math.isnan(joint_mcse(ll))
    const = np.full((2, 50, 3), -1.5)
    assert joint_mcse(const) == pytest.approx(0.0, abs=1e-12)  # every E_i exact
    with pytest.raises(ValueError, match="shape"):
        joint_mcse(np.zeros(5))


def test_scores_report_the_joint_value_and_take_an_external_one():
    rng = np.random.default_rng(6)
    y = rng.normal(size=15)
    mu_n, tau_n = posterior(y, 1.0, 0.0, 3.0)
    ll = loglik(y, posterior_draws(mu_n, tau_n, 0.0, rng, draws=200), 1.0)
    sc = batch_scores(ll, 1.0)
    d = sc.to_dict()["loo"]
    assert d["mcse_method"] == "joint" and d["mcse"] == pytest.approx(joint_mcse(ll, 1.0))
    assert d["mcse_independent"] == pytest.approx(math.sqrt(np.sum(sc.loo_mcse_pointwise ** 2)))
    # the streaming path: a ratio measured at the last store pass scales the independent value
    sc.loo["mcse"], sc.loo["mcse_method"] = sc.loo["mcse_independent"], "independent"
    sc.use_joint_mcse(ratio=1.5)
    assert sc.loo["mcse"] == pytest.approx(1.5 * d["mcse_independent"])
    assert sc.to_dict()["loo"]["mcse_method"] == "joint-scaled"
    sc.use_joint_mcse(0.123)
    assert sc.loo["mcse"] == 0.123 and sc.loo["mcse_method"] == "joint"
    sc.use_joint_mcse(float("nan"))  # ignored
    assert sc.loo["mcse"] == 0.123
