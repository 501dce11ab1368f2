"""Tests of chainvigil.estimators.compare against outside references (each named beside its check)."""

import math

import numpy as np
import pytest
from scipy import optimize, stats
from scipy.special import logsumexp

from chainvigil.estimators.compare import compare_runs, pairwise_differences, stacking_weights


def exact_loo_normal(y, sigma, mu0, tau0):
    """Exact leave-one-out log predictive densities of the normal model with known sigma and a
    N(mu0, tau0^2) prior on the mean (conjugate results, Gelman et al., BDA3, Sec. 2.5, section number from memory):
    posterior from y_{-i}: precision P = 1/tau0^2 + (n-1)/sigma^2,
    mean m = (mu0/tau0^2 + sum_{j != i} y_j / sigma^2) / P; predictive y_i ~ N(m, sigma^2 + 1/P)."""
    n = y.size
    precision = 1 / tau0**2 + (n - 1) / sigma**2
    mean = (mu0 / tau0**2 + (y.sum() - y) / sigma**2) / precision
    return stats.norm.logpdf(y, loc=mean, scale=math.sqrt(sigma**2 + 1 / precision))


def objective(lpd, w):
    """sum_i log sum_k w_k exp(lpd_ik): the stacking objective (Yao et al. 2018, eq. 4)."""
    with np.errstate(divide="ignore"):
        return logsumexp(lpd + np.log(w), axis=1).sum()


# --- compare_runs ---------------------------------------------------------------------------------


def test_delta_and_se_against_normal_model_closed_form():
    # Data from N(0.5, 1). Run "right" knows sigma = 1, run "wide" assumes sigma = c = 2; both have a
    # weak N(0, 10^2) prior on the mean; their exact LOO elpd_i follow from the conjugate results.
    # Per observation, up to O(1/n) terms, Delta_i = -log c + (z^2/2)(1 - 1/c^2) with z ~ N(0, 1), so
    #   E[Delta_i] = -KL(N(0,1) || N(0,c^2)) = -log c + (1 - 1/c^2)/2   (KL between normals)
    #   var(Delta_i) = (1 - 1/c^2)^2 / 4 * var(z^2) = (1 - 1/c^2)^2 / 2   (chi-square(1) variance 2)
    c, n = 2.0, 20_000
    rng = np.random.default_rng(20)
    y = rng.normal(0.5, 1.0, size=n)
    right = exact_loo_normal(y, 1.0, 0.0, 10.0)
    wide = exact_loo_normal(y, c, 0.0, 10.0)
    rows = compare_runs({"wide": wide, "right": right}, {"wide": 0.0, "right": 0.0})
    assert [r["run"] for r in rows] == ["right", "wide"]
    best, other = rows
    assert best["delta"] == 0.0 and best["se_delta"] == 0.0
    se_population = math.sqrt(n * (1 - 1 / c**2) ** 2 / 2)
    assert other["se_delta"] == pytest.approx(se_population, rel=0.05)
    expected_delta = n * (-math.log(c) + (1 - 1 / c**2) / 2)
    # Delta scatters around n E[Delta_i] with sd SE(Delta): within 3 SE
    assert abs(other["delta"] - expected_delta) < 3 * se_population
    # and it is the difference of the summed exact LOO densities
    assert other["delta"] == pytest.approx(wide.sum() - right.sum(), rel=1e-12)
    assert other["elpd"] == pytest.approx(wide.sum(), rel=1e-12)
    assert not other["caution"] and not other["may_flip"]
    # the true model takes essentially all the stacking weight: its density is higher on most points
    assert best["weight"] > 0.95


def test_se_delta_of_a_constant_shift_is_zero_and_of_noise_is_its_sd_times_sqrt_n():
    # Delta_i = const has no spread; Delta_i = N(0, s^2) noise gives SE ~ s sqrt(n)
    # (SE(Delta) = sqrt(n var_i Delta_i), Vehtari, Gelman & Gabry 2017 Sec. 5.2)
    rng = np.random.default_rng(21)
    a = rng.normal(-1.2, 0.5, size=4000)
    rows = compare_runs({"a": a, "b": a - 0.01}, {"a": 0.1, "b": 0.1})
    assert rows[1]["run"] == "b"
    assert rows[1]["delta"] == pytest.approx(-40.0, rel=1e-9)
    assert rows[1]["se_delta"] == pytest.approx(0.0, abs=1e-9)
    noise = rng.normal(0.0, 0.3, size=4000)
    rows = compare_runs({"a": a, "b": a + noise - noise.mean() - 0.002}, {"a": 0.1, "b": 0.1})
    assert rows[1]["se_delta"] == pytest.approx(0.3 * math.sqrt(4000), rel=0.05)


def test_mcse_delta_adds_independent_errors_in_quadrature():
    # variance of a difference of independent estimates = sum of variances (3-4-5 triangle)
    rng = np.random.default_rng(22)
    a = rng.normal(-1.0, 0.2, size=500)
    rows = compare_runs({"a": a, "b": a - 0.1}, {"a": 0.3, "b": 0.4})
    assert rows[1]["mcse_delta"] == pytest.approx(0.5, rel=1e-12)
    assert rows[0]["mcse_delta"] == 0.0


def test_caution_and_may_flip_flags():
    rng = np.random.default_rng(23)
    base = rng.normal(-1.0, 0.3, size=1000)
    noise = rng.normal(0.0, 0.05, size=1000)
    close = base + noise - noise.mean() - 0.001  # delta = -1: |Delta| < 4 (Sivula et al.)
    far = base + noise - noise.mean() - 0.02  # delta = -20
    rows = {r["run"]: r for r in compare_runs({"base": base, "close": close, "far": far},
                                              {"base": 0.6, "close": 0.6, "far": 0.6})}
    assert rows["close"]["caution"] and not rows["far"]["caution"]
    # |Delta| = 1 < 2 * sqrt(0.6^2 + 0.6^2) = 1.70: more draws could swap the two
    assert rows["close"]["may_flip"] and not rows["far"]["may_flip"]
    assert not rows["base"]["caution"] and not rows["base"]["may_flip"]
    # few observations: SE(Delta) too optimistic whatever Delta (Sivula et al.: n < 100)
    small = compare_runs({"p": base[:50], "q": base[:50] - 1.0}, {"p": 0.01, "q": 0.01})
    assert small[1]["delta"] == pytest.approx(-50.0) and small[1]["caution"]
    assert not small[1]["may_flip"]


def test_compare_rows_weights_and_errors():
    rng = np.random.default_rng(24)
    a = rng.normal(-1.0, 0.3, size=300)
    runs = {"m1": a, "m2": a + rng.normal(0, 0.2, 300) - 0.05, "m3": a + rng.normal(0, 0.2, 300) - 0.1}
    rows = compare_runs(runs, {"m1": 0.1, "m2": 0.1, "m3": 0.1})
    assert [r["elpd"] for r in rows] == sorted((float(v.sum()) for v in runs.values()), reverse=True)
    assert all(r["delta"] <= 0 for r in rows)
    assert sum(r["weight"] for r in rows) == pytest.approx(1.0, abs=1e-12)
    assert set(rows[0]) == {"run", "elpd", "delta", "se_delta", "mcse_delta", "weight", "caution",
                            "may_flip"}
    single = compare_runs({"only": a}, {"only": 0.2})
    assert single[0]["weight"] == 1.0 and single[0]["delta"] == 0.0
    with pytest.raises(ValueError, match=r"'m1' \(n=300\).*'short' \(n=299\)"):
        compare_runs({"m1": a, "short": a[:-1]}, {"m1": 0.1, "short": 0.1})
    with pytest.raises(ValueError, match="no MCSE given for run 'm2'"):
        compare_runs({"m1": a, "m2": a}, {"m1": 0.1})
    with pytest.raises(ValueError, match="run 'm2': MCSE must be a number, got None"):
        compare_runs({"m1": a, "m2": a}, {"m1": 0.1, "m2": None})
    bad = a.copy()
    bad[17] = np.nan
    with pytest.raises(ValueError, match="'m2'.*observation index 17"):
        compare_runs({"m1": a, "m2": bad}, {"m1": 0.1, "m2": 0.1})
    with pytest.raises(ValueError, match="no runs"):
        compare_runs({}, {})


# --- stacking_weights -----------------------------------------------------------------------------


def test_pairwise_differences_against_a_direct_computation():
    # outside reference: numpy on the pointwise arrays, SE(Δ) = sqrt(n var_i(Δ_i)) (Vehtari, Gelman &
    # Gabry 2017, Sec. 5.2) and MCSE(Δ) = sqrt(a² + b²) of the two runs' MCSEs, for every pair
    rng = np.random.default_rng(8)
    n = 60
    base = rng.normal(-1.2, 0.4, n)
    pointwise = {"gull": base + rng.normal(0, 0.05, n), "tern": base - 0.1 + rng.normal(0, 0.2, n),
                 "auk": base - 0.02 + rng.normal(0, 0.1, n)}
    mcse = {"gull": 0.03, "tern": 0.2, "auk": 0.01}
    pairs = pairwise_differences(pointwise, mcse)
    elpd = {r: v.sum() for r, v in pointwise.items()}
    order = sorted(elpd, key=lambda r: -elpd[r])
    assert [(p["run_a"], p["run_b"]) for p in pairs] == [(order[0], order[1]), (order[0], order[2]),
                                                          (order[1], order[2])]
    for p in pairs:
        d = pointwise[p["run_a"]] - pointwise[p["run_b"]]
        assert p["delta"] == pytest.approx(d.sum(), rel=1e-12) and p["delta"] >= 0
        assert p["se_delta"] == pytest.approx(math.sqrt(n * np.var(d, ddof=1)), rel=1e-12)
        assert p["mcse_delta"] == pytest.approx(math.sqrt(mcse[p["run_a"]] ** 2 + mcse[p["run_b"]] ** 2))
        assert p["caution"] == (abs(d.sum()) < 4 or n < 100)
        assert p["may_flip"] == (abs(d.sum()) < 2 * p["mcse_delta"])
    # the pairs with the best run repeat compare_runs' rows, sign turned
    rows = {r["run"]: r for r in compare_runs(pointwise, mcse)}
    for p in pairs[:2]:
        row = rows[p["run_b"]]
        assert (-p["delta"], p["se_delta"], p["mcse_delta"]) == pytest.approx(
            (row["delta"], row["se_delta"], row["mcse_delta"]), rel=1e-12)
    assert pairwise_differences({"solo": base}, {"solo": 0.1}) == []
    with pytest.raises(ValueError, match="pairwise_differences: no MCSE given for run 'auk'"):
        pairwise_differences(pointwise, {"gull": 0.1, "tern": 0.1})


def test_stacking_dominant_model_takes_all_weight():
    # if p_1i > p_2i for every i, sum_i log(w p_1i + (1-w) p_2i) increases in w: optimum at w = 1
    rng = np.random.default_rng(25)
    lpd1 = rng.normal(-1.0, 0.5, size=400)
    lpd2 = lpd1 - rng.uniform(0.5, 2.0, size=400)
    w = stacking_weights(np.column_stack([lpd2, lpd1]))
    assert w[1] > 0.999 and w.sum() == pytest.approx(1.0)


def test_stacking_identical_models_share_equally():
    # identical columns: every split of the weight gives the same objective; symmetry gives 1/K
    rng = np.random.default_rng(26)
    lpd = rng.normal(-1.0, 0.5, size=300)
    np.testing.assert_allclose(stacking_weights(np.column_stack([lpd, lpd, lpd])), 1 / 3, atol=1e-9)


def test_stacking_two_models_against_grid_search():
    # brute force: evaluate the objective on a fine grid of w in [0, 1] (no optimiser involved)
    rng = np.random.default_rng(27)
    y = rng.standard_t(df=4, size=500)
    lpd = np.column_stack([stats.norm.logpdf(y, 0, 1.3), stats.cauchy.logpdf(y, 0, 0.9)])
    w = stacking_weights(lpd)
    grid = np.linspace(0, 1, 100_001)
    values = np.array([objective(lpd, np.array([g, 1 - g])) for g in grid[::100]])
    coarse = grid[::100][np.argmax(values)]
    fine = grid[(grid > coarse - 0.002) & (grid < coarse + 0.002)]
    fine_values = np.array([objective(lpd, np.array([g, 1 - g])) for g in fine])
    w_grid = fine[np.argmax(fine_values)]
    assert 0.05 < w_grid < 0.95  # an interior optimum, so the test means something
    assert w[0] == pytest.approx(w_grid, abs=2e-5)
    assert objective(lpd, w) >= fine_values.max() - 1e-9


def test_stacking_recovers_mixture_proportions():
    # with the mixture components as the "models", the stacking objective is the mixture
    # log-likelihood in the proportions, whose maximiser is consistent for the true ones
    # (maximum likelihood for mixing proportions; McLachlan & Peel 2000, Finite Mixture Models, ch. 2,
    # chapter from memory)
    rng = np.random.default_rng(28)
    n = 6000
    comp = rng.uniform(size=n) < 0.3
    y = np.where(comp, rng.normal(-2.0, 1.0, n), rng.normal(2.0, 1.0, n))
    lpd = np.column_stack([stats.norm.logpdf(y, -2, 1), stats.norm.logpdf(y, 2, 1), stats.norm.logpdf(y, 0, 3)])
    w = stacking_weights(lpd)
    assert w[0] == pytest.approx(0.3, abs=0.03) and w[1] == pytest.approx(0.7, abs=0.03)
    assert w[2] < 0.03


def test_stacking_three_models_against_scipy_constrained_solver():
    # an independent solver: SLSQP directly on the simplex (scipy.optimize), and the EM fixed point
    # mean_i pi_ij = w_j at an interior optimum (Dempster, Laird & Rubin 1977)
    rng = np.random.default_rng(29)
    y = rng.standard_t(df=3, size=400)
    lpd = np.column_stack([stats.norm.logpdf(y, 0, 1), stats.norm.logpdf(y, 0, 2.5), stats.laplace.logpdf(y, 0, 1)])
    w = stacking_weights(lpd)
    ref = optimize.minimize(lambda v: -objective(lpd, v), np.full(3, 1 / 3), method="SLSQP",
                            bounds=[(0, 1)] * 3, constraints={"type": "eq", "fun": lambda v: v.sum() - 1},
                            options={"ftol": 1e-14, "maxiter": 1000})
    assert objective(lpd, w) >= -ref.fun - 1e-6
    interior = w > 1e-3
    joint = lpd + np.log(w)
    pi = np.exp(joint - logsumexp(joint, axis=1, keepdims=True))
    np.testing.assert_allclose(pi.mean(axis=0)[interior], w[interior], atol=1e-5)


def test_stacking_is_stable_for_very_negative_densities_and_rejects_bad_input():
    rng = np.random.default_rng(30)
    y = rng.standard_t(df=4, size=300)
    base = np.column_stack([stats.norm.logpdf(y, 0, 1.0), stats.cauchy.logpdf(y, 0, 1.0)])
    # the reference optimum by grid search over w in [0, 1] (no optimiser involved): steps of 0.005,
    # then steps of 1e-5 around the best (the objective is concave in w); it is far from equal
    # weights, so a no-op returning the start cannot pass
    coarse = np.linspace(0, 1, 201)
    best = coarse[np.argmax([objective(base, np.array([g, 1 - g])) for g in coarse])]
    grid = np.clip(np.linspace(best - 0.005, best + 0.005, 1001), 0.0, 1.0)
    w_grid = grid[np.argmax([objective(base, np.array([g, 1 - g])) for g in grid])]
    assert abs(w_grid - 0.5) > 0.1
    assert stacking_weights(base)[0] == pytest.approx(w_grid, abs=1e-4)
    shifted = base - 5000.0  # exp(-5000) underflows; the optimum does not move (common factor)
    assert stacking_weights(shifted)[0] == pytest.approx(w_grid, abs=1e-4)
    assert stacking_weights(base[:, 0]) == pytest.approx([1.0])
    bad = base.copy()
    bad[12, 1] = -np.inf
    with pytest.raises(ValueError, match="observation index 12, model 1"):
        stacking_weights(bad)
