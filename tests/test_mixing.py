"""Tests of chainvigil.estimators.mixing against outside references (each named beside its check)."""

import math

import numpy as np
import pytest
from scipy import signal, special, stats

from chainvigil.estimators import mixing as mx

RHO = 0.9


def ar1(rng, chains, draws, rho, burn=500):
    """Stationary Gaussian AR(1) chains x_t = rho x_{t-1} + e_t, e_t ~ N(0, 1)."""
    e = rng.normal(size=(chains, draws + burn))
    return signal.lfilter([1.0], [1.0, -rho], e, axis=1)[:, burn:]


def ar1_sets(seed, n_sets=10, chains=4, draws=5000, rho=RHO):
    """n_sets independent sets of stationary AR(1) chains (averaging tames the estimators' noise:
    a single ESS estimate for rho = 0.9 varies by about 6-8% between seeds)."""
    rng = np.random.default_rng(seed)
    return [ar1(rng, chains, draws, rho) for _ in range(n_sets)]


def tau_indicator(q, rho, kmax=200):
    """Integrated autocorrelation time of I(X_t <= q) for a unit-variance Gaussian AR(1).

    Mehler's formula (Hermite expansion of the bivariate normal density): with
    E[I(X <= q) He_k(X)] = -He_{k-1}(q) phi(q), Cov(g(X_0), g(X_t)) = sum_k c_k^2 rho^{kt} / k!,
    so tau = 1 + 2 sum_k w_k rho^k / (1 - rho^k) / (p (1 - p)), w_k = (He_{k-1}(q) phi(q))^2 / k!.
    """
    p = stats.norm.cdf(q)
    k = np.arange(1, kmax + 1)
    log_w = (
        2 * np.log(np.abs(special.eval_hermitenorm(k - 1, q)) + 1e-300)
        + 2 * stats.norm.logpdf(q)
        - special.gammaln(k + 1)
    )
    w = np.exp(log_w)
    return 1.0 + 2.0 * np.sum(w * rho**k / (1 - rho**k)) / (p * (1 - p))


# --- rank normalisation --------------------------------------------------------------------------


def test_rank_normalize_matches_scipy_primitives():
    rng = np.random.default_rng(0)
    x = np.round(rng.normal(size=(3, 40)), 1)  # rounding makes ties
    z = mx.rank_normalize(x)
    # reference: scipy.stats.rankdata (average ranks) + scipy.stats.norm.ppf, Blom offset 3/8
    # (Vehtari et al. 2021, Bayesian Analysis 16(2), rank normalisation)
    s = x.size
    ref = stats.norm.ppf((stats.rankdata(x.ravel(), method="average") - 3 / 8) / (s - 3 / 4 + 1))
    np.testing.assert_allclose(z.ravel(), ref, rtol=0, atol=1e-12)
    # tied draws share one value
    values, counts = np.unique(x, return_counts=True)
    tied = x == values[np.argmax(counts)]
    assert tied.sum() > 1 and np.ptp(z[tied]) == 0


def test_split_chains_drops_middle_draw_for_odd_lengths():
    # VGSCB 2021 Sec. 3: each chain is cut into a first and a second half of equal length
    x = np.arange(10.0).reshape(2, 5)
    s = mx.split_chains(x)
    np.testing.assert_array_equal(s, [[0, 1], [5, 6], [3, 4], [8, 9]])


def test_autocovariance_matches_direct_sum():
    # reference: the definition gamma_t = (1/N) sum (x_n - xbar)(x_{n+t} - xbar), evaluated by numpy
    rng = np.random.default_rng(1)
    x = rng.normal(size=37)
    c = x - x.mean()
    direct = np.array([np.dot(c[: 37 - t], c[t:]) / 37 for t in range(37)])
    np.testing.assert_allclose(mx.autocovariance(x), direct, atol=1e-12)


def test_ess_production_path_matches_the_formula_from_direct_sums():
    # The ESS that production uses (the vectorised FFT path behind ess, ess_bulk, r_eff and the
    # joint MCSE) against its formula written out with direct-sum autocovariances, no FFT
    # (VGSCB 2021 Sec. 3.2; Geyer 1992): rho_t = 1 - (W - mean_m s_m^2 rho_tm) / var+,
    # P_t = rho_2t + rho_2t+1 while positive, made monotone, tau = -1 + 2 sum P_t, ESS = MN / tau.
    rng = np.random.default_rng(2)
    M, N, phi = 3, 101, 0.6
    x = np.empty((M, N))
    x[:, 0] = rng.normal(size=M)
    for t in range(1, N):
        x[:, t] = phi * x[:, t - 1] + rng.normal(size=M)
    c = x - x.mean(axis=1, keepdims=True)
    acov = np.array([[np.dot(c[m, : N - t], c[m, t:]) / N for t in range(N)] for m in range(M)])
    s2 = x.var(axis=1, ddof=1)
    W = s2.mean()
    var_plus = (N - 1) / N * W + x.mean(axis=1).var(ddof=1)
    rho_m = acov / acov[:, :1]
    rho = 1 - (W - (s2[:, None] * rho_m).mean(axis=0)) / var_plus
    P, best = [], np.inf
    for t in range(N // 2):
        p = rho[2 * t] + rho[2 * t + 1]
        if p <= 0:
            break
        best = min(best, p)
        P.append(best)
    tau = max(-1 + 2 * sum(P), 1 / np.log10(M * N))
    assert mx.ess(x, split=False) == pytest.approx(M * N / tau, rel=1e-10)
    assert mx._ess_vectorised(x[:, :, None])[0] == pytest.approx(M * N / tau, rel=1e-10)


# --- ESS ------------------------------------------------------------------------------------------


def test_bulk_ess_of_ar1_matches_time_series_result():
    sets = ar1_sets(seed=2)
    s = sets[0].size
    expected = s * (1 - RHO) / (1 + RHO)  # ESS = S (1 - rho)/(1 + rho): standard AR(1) result
    ratios = [mx.ess_bulk(x) / expected for x in sets]
    assert abs(np.mean(ratios) - 1) < 0.10
    assert all(0.7 < r < 1.3 for r in ratios)
    raw = [mx.ess_mean(x) / expected for x in sets]  # same result for the raw values
    assert abs(np.mean(raw) - 1) < 0.10


def test_tail_ess_of_ar1_matches_mehler_formula():
    sets = ar1_sets(seed=3)
    scale = math.sqrt(1 / (1 - RHO**2))  # stationary sd of the AR(1)
    # tau of the 5% indicator, by symmetry equal to the 95% one: Mehler's formula (see tau_indicator)
    tau = tau_indicator(stats.norm.ppf(0.05), RHO)
    ratios = [mx.ess_tail(x / scale) / (x.size / tau) for x in sets]
    assert abs(np.mean(ratios) - 1) < 0.10
    # tail-ESS is invariant to scaling and larger than the bulk-ESS here (tau 8.6 < 19)
    assert mx.ess_tail(sets[0]) == pytest.approx(mx.ess_tail(sets[0] / scale), rel=1e-9)
    assert mx.ess_tail(sets[0]) > mx.ess_bulk(sets[0])


def test_antithetic_chains_ess_above_draws_and_capped():
    # negative rho: ESS = S (1 - rho)/(1 + rho) > S still holds (standard AR(1) result);
    # rho = -0.5 gives 3 S, below the documented cap S log10(S)
    sets = ar1_sets(seed=31, n_sets=4, draws=2000, rho=-0.5)
    s = sets[0].size
    assert np.mean([mx.ess_bulk(x) for x in sets]) == pytest.approx(3 * s, rel=0.10)
    # rho = -0.9 would give 19 S: the tau >= 1/log10(S) guard caps the ESS at S log10(S)
    x = ar1(np.random.default_rng(32), 4, 2000, -0.9)
    assert mx.ess_mean(x) == pytest.approx(s * math.log10(s), rel=1e-9)


def test_initial_monotone_sequence_limit_for_a_seasonal_process():
    # x = sqrt(0.6) u + sqrt(0.4) v with u_t = 0.9 u_{t-3} + e_t and v an AR(1) with rho = 0.85,
    # both scaled to unit variance: rho_k = 0.6 * 0.9^(k/3) [k divisible by 3] + 0.4 * 0.85^k.
    # Its pair sums P_t = rho_2t + rho_2t+1 are positive but not monotone (1.34, 1.08, 0.39, 0.77, ..),
    # so Geyer's (1992) initial monotone sequence caps them, and the ESS estimator tends to
    # S / tau_mono computed from the exact rho_k (about 0.132 S) instead of S / tau (about 0.061 S).
    # (A single estimate varies by about 10% here; 10 sets of 4 x 20,000 draws average that out.)
    phi, rho, wa = 0.9, 0.85, 0.6
    k = np.arange(600)
    r = wa * np.where(k % 3 == 0, phi ** (k / 3), 0.0) + (1 - wa) * rho**k
    pairs = r[0::2] + r[1::2]
    keep = np.logical_and.accumulate(pairs > 0)
    tau_mono = -1 + 2 * np.minimum.accumulate(pairs)[keep].sum()
    rng = np.random.default_rng(33)
    ratios = []
    for _ in range(10):
        e = rng.normal(size=(2, 4, 20300))
        u = signal.lfilter([1.0], [1, 0, 0, -phi], e[0], axis=1)[:, 300:] * math.sqrt(1 - phi**2)
        v = signal.lfilter([1.0], [1, -rho], e[1], axis=1)[:, 300:] * math.sqrt(1 - rho**2)
        x = math.sqrt(wa) * u + math.sqrt(1 - wa) * v
        ratios.append(mx.ess_mean(x) / (x.size / tau_mono))
    assert np.mean(ratios) == pytest.approx(1.0, abs=0.12)


def test_iid_normal_ess_close_to_number_of_draws():
    # independent draws: tau = 1, ESS = S (definition of the ESS)
    rng = np.random.default_rng(4)
    x = rng.normal(size=(4, 2000))
    assert mx.ess_bulk(x) == pytest.approx(x.size, rel=0.08)
    assert mx.ess_mean(x) == pytest.approx(x.size, rel=0.08)
    assert mx.ess_tail(x) == pytest.approx(x.size, rel=0.15)


def test_mcse_mean_matches_ar1_long_run_variance():
    # AR(1) with unit innovations: long-run variance sigma^2/(1 - rho)^2 (standard time-series
    # result), so MCSE of the mean = sqrt(1/(1 - rho)^2 / S)
    sets = ar1_sets(seed=5)
    ratios = [mx.mcse_of_mean(x) / math.sqrt(1 / (1 - RHO) ** 2 / x.size) for x in sets]
    assert abs(np.mean(ratios) - 1) < 0.10
    # and the sample means scatter around 0 by about that much (z-scores of a standard normal)
    z = np.array([x.mean() / mx.mcse_of_mean(x) for x in sets])
    assert np.all(np.abs(z) < 4)


# --- R-hat ----------------------------------------------------------------------------------------


def test_rhat_near_one_for_stationary_chains():
    # stationary chains from one distribution: R-hat -> 1 (VGSCB 2021; Gelman et al. BDA3 11.4)
    for x in ar1_sets(seed=6, n_sets=3):
        assert 1.0 - 1e-3 < mx.split_rhat(x) < 1.01


def test_rhat_large_for_chains_started_apart():
    # chains centred several stationary SDs apart have not mixed: R-hat well above 1.1
    # (Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021)
    rng = np.random.default_rng(7)
    x = ar1(rng, 4, 2000, RHO)
    sd = math.sqrt(1 / (1 - RHO**2))
    x = x + (np.arange(4) * 3 * sd)[:, None]
    assert mx.split_rhat(x) > 1.1
    assert mx.rhat_basic(x) > 1.1
    # the multi-chain ESS uses var+ (which holds the between-chain variance), so chains that never
    # meet give a tiny ESS even though each is well mixed on its own (VGSCB 2021 Sec. 3.2)
    iid_apart = rng.normal(size=(4, 2000)) + (np.arange(4) * 4.0)[:, None]
    assert mx.ess_bulk(iid_apart) < 0.02 * iid_apart.size
    assert mx.ess_mean(iid_apart) < 0.02 * iid_apart.size


def test_split_rhat_sees_a_trend_shared_by_all_chains():
    # every chain drifts the same way: between-chain variance stays small, so unsplit R-hat ~ 1,
    # while splitting each chain exposes the drift (VGSCB 2021 Sec. 3.1; BDA3 Sec. 11.4)
    rng = np.random.default_rng(8)
    x = rng.normal(size=(4, 1000)) + np.linspace(0, 3, 1000)[None, :]
    assert mx.rhat_basic(x, split=False) < 1.01
    assert mx.split_rhat(x) > 1.1


def test_folded_rhat_sees_chains_with_different_scales():
    # same location, different scale: the bulk R-hat barely moves, the folded R-hat does
    # (VGSCB 2021 Sec. 4.2, motivation of folding)
    rng = np.random.default_rng(9)
    x = rng.normal(size=(4, 1000)) * np.array([1.0, 1.0, 1.0, 4.0])[:, None]
    bulk = mx.rhat_basic(mx.rank_normalize(mx.split_chains(x)), split=False)
    assert bulk < 1.02
    assert mx.split_rhat(x) > 1.05


def test_rank_normalisation_handles_heavy_tails():
    # iid Cauchy draws: rank-normalised R-hat ~ 1 and bulk-ESS ~ S although the variance does not
    # exist (VGSCB 2021 Sec. 4.1, reason for rank normalisation)
    rng = np.random.default_rng(10)
    x = stats.cauchy.rvs(size=(4, 2000), random_state=rng)
    assert mx.split_rhat(x) < 1.01
    assert mx.ess_bulk(x) == pytest.approx(x.size, rel=0.08)


# --- degenerate and bad input -------------------------------------------------------------------


def test_constant_and_too_short_chains_give_nan():
    const = np.full((4, 100), 2.5)
    for f in (mx.split_rhat, mx.ess_bulk, mx.ess_tail, mx.ess_mean, mx.rhat_basic):
        assert math.isnan(f(const))
    assert mx.mcse_of_mean(const) == 0.0
    short = np.random.default_rng(11).normal(size=(4, 3))
    for f in (mx.split_rhat, mx.ess_bulk, mx.ess_tail, mx.mcse_of_mean):
        assert math.isnan(f(short))
    assert math.isfinite(mx.split_rhat(np.random.default_rng(11).normal(size=(4, 4))))


def test_non_finite_draws_are_rejected_with_their_position():
    x = np.zeros((2, 10))
    x[1, 7] = np.nan
    with pytest.raises(ValueError, match="chain 1, draw 7"):
        mx.split_rhat(x)
    with pytest.raises(ValueError, match="shape"):
        mx.ess_bulk(np.zeros((2, 3, 4)))


# --- mixing_summary -------------------------------------------------------------------------------


def test_mixing_summary_on_known_chains():
    rng = np.random.default_rng(12)
    s_chain = 5000
    a = ar1(rng, 4, s_chain, RHO)  # AR(1): ESS ~ S (1-rho)/(1+rho)
    b = rng.normal(loc=3.0, size=(4, s_chain))  # iid N(3, 1): ESS ~ S
    c = np.full((4, s_chain), 7.0)  # constant
    draws = np.stack([a, b, c], axis=2)
    out = mx.mixing_summary(draws, ["a", "b", "c"])
    s = 4 * s_chain
    pa, pb, pc = out["params"]["a"], out["params"]["b"], out["params"]["c"]
    assert set(pa) == {"mean", "mcse", "rhat", "ess_bulk", "ess_tail", "sd", "q05", "q95",
                       "chain_means", "chain_sds"}
    # standard AR(1) result, tolerance 25% for a single set (seed-to-seed spread ~7%)
    assert pa["ess_bulk"] == pytest.approx(s * (1 - RHO) / (1 + RHO), rel=0.25)
    assert pb["ess_bulk"] == pytest.approx(s, rel=0.1)  # iid: ESS = S
    assert abs(pb["mean"] - 3.0) < 4 * pb["mcse"]  # CLT: mean within 4 MCSE of the truth
    assert pb["mcse"] == pytest.approx(1 / math.sqrt(s), rel=0.1)  # iid: MCSE = sd/sqrt(S)
    assert pc == {"mean": 7.0, "mcse": 0.0, "rhat": None, "ess_bulk": None, "ess_tail": None,
                  "sd": 0.0, "q05": 7.0, "q95": 7.0, "chain_means": [7.0] * 4, "chain_sds": [0.0] * 4}
    assert out["ess_bulk_min"] == pa["ess_bulk"]
    assert out["rhat_max"] == max(pa["rhat"], pb["rhat"]) and out["rhat_max"] < 1.01
    assert out["ess_tail_min"] == min(pa["ess_tail"], pb["ess_tail"])
    for p in out["params"].values():
        flat = [v for v in p.values() if not isinstance(v, list)] + p["chain_means"] + p["chain_sds"]
        assert all(v is None or type(v) is float for v in flat)
    # the per-parameter path of the summary and the one-parameter functions agree
    for key, f in (("rhat", mx.split_rhat), ("ess_bulk", mx.ess_bulk), ("ess_tail", mx.ess_tail),
                   ("mcse", mx.mcse_of_mean)):
        assert pa[key] == pytest.approx(f(a), rel=1e-12) and pb[key] == pytest.approx(f(b), rel=1e-12)


def test_mixing_summary_spread_interval_and_chains_against_numpy():
    # outside reference: numpy (np.std with ddof=1, np.quantile with its default linear
    # interpolation) on draws we know, pooled over all chains and draws
    rng = np.random.default_rng(3)
    draws = np.stack([rng.normal(0.0, 1.0, (3, 41)), rng.gamma(2.0, 1.5, (3, 41))], axis=2)
    draws[2, :, 0] += 4.0  # the third chain apart, so its per-chain figures differ
    out = mx.mixing_summary(draws, ["mu", "scale"])
    for j, name in enumerate(("mu", "scale")):
        p, pooled = out["params"][name], draws[:, :, j].ravel()
        assert p["sd"] == pytest.approx(np.std(pooled, ddof=1), rel=1e-12)
        assert p["q05"] == pytest.approx(np.quantile(pooled, 0.05), rel=1e-12)
        assert p["q95"] == pytest.approx(np.quantile(pooled, 0.95), rel=1e-12)
        assert p["chain_means"] == pytest.approx([np.mean(draws[m, :, j]) for m in range(3)], rel=1e-12)
        assert p["chain_sds"] == pytest.approx([np.std(draws[m, :, j], ddof=1) for m in range(3)],
                                               rel=1e-12)
    # linear interpolation by hand on 1..11 (one chain of 11 draws): h = 1 + 10 p
    small = mx.mixing_summary(np.arange(1.0, 12.0)[None, :, None], ["x"])["params"]["x"]
    assert small["q05"] == pytest.approx(1.5) and small["q95"] == pytest.approx(10.5)
    assert small["sd"] == pytest.approx(math.sqrt(11.0))  # variance of 1..11 with ddof 1 is 11
    assert out["params"]["mu"]["rhat"] > 1.1  # the chain apart shows in R-hat too
    # one draw per chain: no per-chain sd
    one = mx.mixing_summary(np.array([[[1.0]], [[3.0]]]), ["z"])["params"]["z"]
    assert one["chain_sds"] == [None, None] and one["sd"] == pytest.approx(math.sqrt(2.0))


def test_mixing_summary_too_few_draws_and_bad_input():
    out = mx.mixing_summary(np.arange(12.0).reshape(2, 3, 2), ["x", "y"])
    assert out["rhat_max"] is None and out["ess_bulk_min"] is None and out["ess_tail_min"] is None
    assert out["params"]["x"]["mean"] == pytest.approx(5.0)  # (0+2+4+6+8+10)/6
    assert out["params"]["x"]["mcse"] is None
    with pytest.raises(ValueError, match="2 names for 3 parameters"):
        mx.mixing_summary(np.zeros((2, 10, 3)), ["a", "b"])
    bad = np.zeros((2, 10, 2))
    bad[0, 4, 1] = np.inf
    with pytest.raises(ValueError, match=r"'sigma'.*chain 0, draw 4"):
        mx.mixing_summary(bad, ["mu", "sigma"])
    with pytest.raises(ValueError, match="duplicate"):
        mx.mixing_summary(np.zeros((2, 10, 2)), ["mu", "mu"])


# --- relative_efficiency --------------------------------------------------------------------------


def test_relative_efficiency_of_independent_draws_is_one():
    # independent draws: ESS = S, so r_eff = 1 (Vehtari, Gelman & Gabry 2017 Sec. 3.2)
    rng = np.random.default_rng(13)
    ll = rng.normal(-1.0, 0.5, size=(4, 1000, 300))
    r = mx.relative_efficiency(ll)
    assert r.shape == (300,)
    assert np.mean(r) == pytest.approx(1.0, abs=0.03)
    assert np.all((r > 0.7) & (r < 1.3))


def test_relative_efficiency_of_ar1_loglik():
    # log-likelihoods that move as a small-variance AR(1): exp(ll) ~ 1 + ll is then nearly linear,
    # so its ESS is the AR(1) one, S (1 - rho)/(1 + rho) (standard time-series result)
    rho = 0.5
    rng = np.random.default_rng(14)
    n = 200
    x = signal.lfilter([1.0], [1.0, -rho], rng.normal(size=(4, 2500, n)), axis=1)[:, 500:]
    ll = -2.0 + 0.01 * x
    r = mx.relative_efficiency(ll)
    assert np.mean(r) == pytest.approx((1 - rho) / (1 + rho), rel=0.05)
    # the vectorised path agrees with the one-series ESS on exp(ll_i) (scale invariance of ESS)
    for i in (0, 57, 199):
        assert r[i] == pytest.approx(mx.ess(np.exp(ll[:, :, i])) / ll[:, :, 0].size, rel=1e-9)


def test_relative_efficiency_single_chain_constant_column_and_errors():
    rng = np.random.default_rng(15)
    ll = rng.normal(size=(1, 400, 5))
    ll[0, :, 3] = -1.25  # the same likelihood in every draw
    r = mx.relative_efficiency(ll)
    np.testing.assert_array_equal(r, mx.relative_efficiency(ll[0]))  # 2-D = one chain
    assert r[3] == 1.0
    assert np.all(np.abs(r[[0, 1, 2, 4]] - 1) < 0.3)  # a single iid chain, split in two: r_eff ~ 1
    np.testing.assert_array_equal(mx.relative_efficiency(ll[:, :3]), np.ones(5))  # too few draws
    # clipped to [1/S, log10 S]
    assert np.all(r >= 1 / 400) and np.all(r <= math.log10(400))
    bad = rng.normal(size=(2, 50, 4))
    bad[1, 20, 2] = np.nan
    with pytest.raises(ValueError, match="observation index 2"):
        mx.relative_efficiency(bad)


def test_finite_relative_efficiency_defines_bad_observations_and_keeps_the_rest():
    # the good observations get exactly relative_efficiency's values; a column holding NaN or -inf gets 1
    rng = np.random.default_rng(21)
    ll = rng.normal(size=(4, 300, 6)) * 0.2 - 1.0
    bad = ll.copy()
    bad[1, 7, 2] = np.nan
    bad[0, 3, 4] = -np.inf
    got = mx.finite_relative_efficiency(bad)
    want = mx.relative_efficiency(ll[:, :, [0, 1, 3, 5]])
    np.testing.assert_array_equal(got[[0, 1, 3, 5]], want)
    assert got[2] == 1.0 and got[4] == 1.0
    np.testing.assert_array_equal(mx.finite_relative_efficiency(ll), mx.relative_efficiency(ll))
