"""Exact LOO and K-fold from refits (chainvigil.estimators.refit) against closed forms.

The conjugate normal model with known variance (tests/_normal_model.py, Gelman et al., BDA3 ch. 2)
gives every posterior in closed form, with and without any set of observations, so "refits" are
draws from the exact posterior without the held-out readings.
"""

import numpy as np
import pytest
from scipy import stats
from scipy.special import logsumexp

from _normal_model import ar1_draws, exact_loo, loglik, posterior
from chainvigil.estimators import psis_loo
from chainvigil.estimators.refit import (combine_pointwise, exact_elpd, kfold_elpd, kfold_plan,
                                         refit_request, request_key)

SIGMA, MU0, TAU0 = 1.0, 0.0, 10.0


def _data_with_outlier(n=20, outlier=12.0, seed=2):
    y = np.random.default_rng(seed).normal(0.0, SIGMA, n)
    y[3] = outlier
    return y


def _refit_draws(y, held_out, rng, shape):
    """Draws of mu from the closed-form posterior without the held-out observations (BDA3 ch. 2)."""
    keep = np.ones(y.size, bool)
    keep[list(held_out)] = False
    m, t = posterior(y[keep], SIGMA, MU0, TAU0)
    return rng.normal(m, t, size=shape)


def test_exact_elpd_is_log_mean_density_with_delta_method_mcse():
    # Source: scipy.special.logsumexp for log (1/S) sum_s exp(ll); the delta-method MCSE
    # sqrt(var(p) / (S r_eff)) / mean(p) written out with numpy (Vehtari, Gelman & Gabry 2017, sec. 3.2)
    rng = np.random.default_rng(1)
    ll = rng.normal(-3.0, 0.7, size=(4, 300, 5))
    r = np.array([1.0, 0.5, 0.8, 0.3, 1.2])
    e, m = exact_elpd(ll, r)
    flat = ll.reshape(-1, 5)
    assert np.allclose(e, logsumexp(flat, axis=0) - np.log(1200), rtol=1e-12)
    p = np.exp(flat)
    assert np.allclose(m, np.sqrt(p.var(axis=0, ddof=1) / (1200 * r)) / p.mean(axis=0), rtol=1e-10)
    # shift invariance of the relative error (a fact of the log): adding c to ll moves elpd by c only
    e2, m2 = exact_elpd(ll + 800.0, r)
    assert np.allclose(e2, e + 800.0) and np.allclose(m2, m)


def test_exact_elpd_edge_values():
    # Source: conventions of the PSIS-LOO module (NaN/+inf is bad input, a zero likelihood is 0)
    ll = np.full((2, 50, 3), -1.0)
    ll[0, 0, 0] = np.nan
    ll[:, :, 1] = -np.inf
    ll[1, 3, 2] = -np.inf
    e, m = exact_elpd(ll)
    assert np.isnan(e[0]) and np.isnan(m[0])
    assert e[1] == -np.inf and m[1] == np.inf
    assert e[2] == pytest.approx(np.log(99 / 100 * np.exp(-1.0)))


def test_exact_elpd_mcse_matches_the_spread_over_replications():
    # Source: the MCSE is the standard deviation of the estimate over independent repetitions
    # (fact of the trade); draws are AR(1) (rho = 0.6) from the closed-form posterior without y_i
    # (BDA3 ch. 2), so r_eff < 1 must enter (default: r_eff computed from the chains).
    y = _data_with_outlier(outlier=3.0)
    keep = np.arange(y.size) != 3
    m, t = posterior(y[keep], SIGMA, MU0, TAU0)
    rng = np.random.default_rng(3)
    est, mcse = [], []
    for _ in range(200):
        mu = ar1_draws(m, t, 4, 250, 0.6, rng)
        e, s = exact_elpd(loglik(y[3:4], mu, SIGMA))
        est.append(e[0])
        mcse.append(s[0])
    truth = exact_loo(y, SIGMA, MU0, TAU0)[3]
    spread = np.std(est, ddof=1)
    assert np.mean(mcse) == pytest.approx(spread, rel=0.2)
    assert abs(np.mean(est) - truth) < 4 * spread / np.sqrt(len(est))
    # ignoring the autocorrelation (r_eff = 1) would understate it
    iid_mcse = np.mean([exact_elpd(loglik(y[3:4], ar1_draws(m, t, 4, 250, 0.6, rng), SIGMA), 1.0)[1][0]
                        for _ in range(20)])
    assert iid_mcse < 0.8 * spread


# 60 repetitions with 400,000 refit draws each (about 1.5 s): the full suite.  The fast run checks the
# same mixed estimate on one run against the closed form, and plain PSIS-LOO too optimistic beside it,
# through the service (test_service_refits.py::test_request_refit_and_mixed_headline_equal_closed_form_exact_loo).
@pytest.mark.slow
def test_mixed_estimate_recovers_exact_loo_where_psis_fails():
    # Source: closed-form exact LOO of the conjugate normal model (BDA3 ch. 2; tests/_normal_model.py);
    # one gross outlier (12 sigma) makes its k-hat exceed 0.7 (Vehtari et al. 2024, JMLR 25(72)).
    # The error of a total is judged against its spread over 60 independent repetitions of the whole
    # procedure (posterior draws + refits): the pointwise errors of one run share the same draws, so
    # the spread, not a sum of pointwise MCSE, is the Monte Carlo error of the total.
    y = _data_with_outlier()
    truth = exact_loo(y, SIGMA, MU0, TAU0).sum()
    m, t = posterior(y, SIGMA, MU0, TAU0)
    rng = np.random.default_rng(7)
    first = psis_loo(loglik(y, rng.normal(m, t, size=(4, 250)), SIGMA))
    flagged = np.flatnonzero(first["pareto_k"] > 0.7)
    assert flagged.tolist() == [3]          # the outlier, and only it, is flagged
    mixed, plain, reported = [], [], []
    for _ in range(60):
        loo = psis_loo(loglik(y, rng.normal(m, t, size=(4, 250)), SIGMA))
        exact = {}
        for i in flagged:
            mu_i = _refit_draws(y, [i], rng, (4, 100_000))
            e, s = exact_elpd(loglik(y[i:i + 1], mu_i, SIGMA))
            exact[int(i)] = (e[0], s[0])
        c = combine_pointwise(loo["pointwise"], loo["mcse_pointwise"], exact,
                              lppd=loo["lppd_pointwise"], pending=flagged)
        assert c["counts"] == {"exact": 1, "psis": 19, "pending": 0} and c["method"] == "mixed"
        mixed.append(c["elpd"])
        plain.append(loo["elpd"])
        reported.append(c["mcse"])
    mixed, plain = np.array(mixed), np.array(plain)
    se_mean = mixed.std(ddof=1) / np.sqrt(mixed.size)
    assert abs(mixed.mean() - truth) < 4 * se_mean
    assert plain.mean() - truth > 4 * se_mean     # PSIS-LOO with k-hat > 0.7 is too optimistic here
    # one run: the mixed total is within a few of its Monte Carlo errors of the closed form
    assert np.mean(np.abs(mixed - truth) < 4 * mixed.std(ddof=1)) >= 0.95


def test_combined_totals_follow_the_pointwise_values():
    # Source: Vehtari, Gelman & Gabry (2017), sec. 4: elpd = sum_i elpd_i, SE = sqrt(n var_i elpd_i),
    # p_eff = lppd - elpd; written out with numpy
    rng = np.random.default_rng(9)
    e = rng.normal(-1.5, 0.4, 30)
    s = rng.uniform(0.01, 0.05, 30)
    lppd = e + rng.uniform(0.0, 0.1, 30)
    c = combine_pointwise(e, s, {4: (-9.0, 0.2), 17: (-6.5, 0.1)}, lppd=lppd, pending=[4, 17, 22])
    ref = e.copy()
    ref[[4, 17]] = [-9.0, -6.5]
    sref = s.copy()
    sref[[4, 17]] = [0.2, 0.1]
    assert c["elpd"] == pytest.approx(ref.sum())
    assert c["se"] == pytest.approx(np.sqrt(30 * np.var(ref, ddof=1)))
    assert c["mcse"] == pytest.approx(np.sqrt(np.sum(sref**2)))
    assert c["p_eff"] == pytest.approx(lppd.sum() - ref.sum())
    assert c["counts"] == {"exact": 2, "psis": 28, "pending": 1}
    assert c["exact_observations"] == [4, 17]
    assert combine_pointwise(e, s, {})["method"] == "psis"
    with pytest.raises(ValueError, match="outside"):
        combine_pointwise(e, s, {30: (0.0, 0.0)})
    # an exact value replaces a PSIS value that was undefined (NaN), so the total becomes defined
    e[5] = np.nan
    assert np.isnan(combine_pointwise(e, s, {})["elpd"])
    assert np.isfinite(combine_pointwise(e, s, {5: (-2.0, 0.1)})["elpd"])


def _closed_form_kfold(y, folds):
    """sum_i log N(y_i | m_-k, sigma^2 + t_-k^2): the posterior without fold k is the conjugate
    posterior over the rest (BDA3 ch. 2), and each held-out y_i's predictive is normal with the
    posterior mean and the sum of the data and posterior variances (BDA3 sec. 2.5)."""
    out = np.empty(y.size)
    for k in np.unique(folds):
        held = folds == k
        m, t = posterior(y[~held], SIGMA, MU0, TAU0)
        out[held] = stats.norm.logpdf(y[held], m, np.sqrt(SIGMA**2 + t**2))
    return out


def test_kfold_elpd_matches_the_closed_form_kfold_value():
    # Source: closed-form K-fold predictive of the conjugate normal model (BDA3 ch. 2 and sec. 2.5),
    # K-fold elpd as in Vehtari, Gelman & Gabry (2017), sec. 2.3. Folds are independent refits, so
    # var(total) <= sum_k (sum_{i in k} mcse_i)^2 (observations of one fold share draws).
    y = _data_with_outlier(n=40, outlier=5.0, seed=4)
    folds = kfold_plan(y.size, K=5, seed=11)
    truth_pointwise = _closed_form_kfold(y, folds)
    rng = np.random.default_rng(12)
    values = {}
    for k in range(1, 6):
        held = np.flatnonzero(folds == k)
        mu = _refit_draws(y, held, rng, (4, 5000))
        values[k] = exact_elpd(loglik(y[held], mu, SIGMA))
        partial = kfold_elpd(folds, values)
        assert partial["complete"] == (k == 5)
        assert partial["folds_missing"] == list(range(k + 1, 6))
        assert partial["observations_done"] == int(np.isin(folds, range(1, k + 1)).sum())
    out = kfold_elpd(folds, values)
    bound = np.sqrt(sum(out["mcse_pointwise"][folds == k].sum() ** 2 for k in range(1, 6)))
    assert abs(out["elpd_kfold"] - truth_pointwise.sum()) < 4 * bound
    assert np.allclose(out["pointwise"], truth_pointwise, atol=4 * out["mcse_pointwise"].max() * 3)
    assert out["se"] == pytest.approx(np.sqrt(40 * np.var(out["pointwise"], ddof=1)))
    # and K-fold with 5 folds is a different quantity from LOO: it leaves 8 readings out at a time
    loo_truth = exact_loo(y, SIGMA, MU0, TAU0).sum()
    assert abs(truth_pointwise.sum() - loo_truth) > 8 * bound
    assert abs(out["elpd_kfold"] - truth_pointwise.sum()) < abs(out["elpd_kfold"] - loo_truth)
    incomplete = kfold_elpd(folds, {1: values[1]})
    assert np.isnan(incomplete["elpd_kfold"]) and not incomplete["complete"]
    with pytest.raises(ValueError, match="fold 2"):
        kfold_elpd(folds, {2: (np.zeros(3), None)})


def test_kfold_plan_balanced_reproducible_and_keeps_groups_together():
    # Source: definitions (fact of the trade): balanced folds differ in size by at most one; the
    # greedy largest-group-first rule keeps the spread within the largest group's size
    for n, K in [(336, 10), (41, 10), (10, 10), (7, 2)]:
        f = kfold_plan(n, K, seed=5)
        sizes = np.bincount(f, minlength=K + 1)[1:]
        assert sizes.min() >= 1 and sizes.max() - sizes.min() <= 1 and sizes.sum() == n
        assert np.array_equal(f, kfold_plan(n, K, seed=5))
    assert not np.array_equal(kfold_plan(336, 10, seed=5), kfold_plan(336, 10, seed=6))
    rng = np.random.default_rng(0)
    groups = [f"g{j}" for j in rng.integers(0, 23, 300)]
    f = kfold_plan(300, 7, seed=1, groups=groups)
    for g in set(groups):
        assert len(set(f[[i for i, x in enumerate(groups) if x == g]])) == 1
    sizes = np.bincount(f, minlength=8)[1:]
    largest = max(groups.count(g) for g in set(groups))
    assert sizes.min() >= 1 and sizes.max() - sizes.min() <= largest
    assert np.array_equal(f, kfold_plan(300, 7, seed=1, groups=groups))
    with pytest.raises(ValueError, match="groups"):
        kfold_plan(6, 4, groups=["a", "a", "b", "b", "c", "c"])
    with pytest.raises(ValueError, match="observations"):
        kfold_plan(5, 10)


def test_refit_request_exact_then_kfold_with_hysteresis():
    # Source: the request rule of chainvigil.estimators.refit.refit_request (k-hat > 0.7, more than
    # 10 % or more than 20 observations flagged -> K-fold); k-hat 0.7 from Vehtari et al. (2024)
    n = 336
    k = np.full(n, 0.2)
    k[[10, 99]] = [0.95, np.inf]
    k[50] = np.nan          # bad input is never flagged
    labels = [f"reading {i + 1}" for i in range(n)]
    assert refit_request(k, labels, run="r", seed=1, too_few_draws=True) is None
    assert refit_request(k, labels, run="r", seed=1, draws=399) is None
    assert refit_request(k, labels, run="r", seed=1, draws=400) is not None
    assert refit_request(np.full(n, 0.3), labels, run="r", seed=1) is None
    req = refit_request(k, labels, run="tarns", seed=1)
    assert req["method"] == "exact" and req["kfold"] is None
    assert req["flagged"] == [{"observation": 11, "label": "reading 11", "k_hat": 0.95},
                              {"observation": 100, "label": "reading 100", "k_hat": None}]
    assert req["refits"] == [{"folder": "tarns--refit-11", "held_out": [11]},
                             {"folder": "tarns--refit-100", "held_out": [100]}]
    # k-hat of 11 dips to 0.65: it stays (above 0.7 - 0.1), and the work is the same
    k2 = k.copy()
    k2[10] = 0.65
    again = refit_request(k2, labels, run="tarns", seed=1, previous=req)
    assert request_key(again) == request_key(req)
    assert [r["observation"] for r in refit_request(k2, labels, run="tarns", seed=1)["flagged"]] == [100]
    # 21 flagged (> max_exact): a K-fold plan over every observation
    k3 = k.copy()
    k3[200:221] = 0.9
    kf = refit_request(k3, labels, run="tarns", seed=4, K=8)
    assert kf["method"] == "kfold" and kf["kfold"]["K"] == 8 and kf["kfold"]["seed"] == 4
    assert np.array_equal(kf["kfold"]["folds"], kfold_plan(n, 8, 4))
    held = sorted(i for r in kf["refits"] for i in r["held_out"])
    assert held == list(range(1, n + 1))
    assert [r["folder"] for r in kf["refits"]] == [f"tarns--fold-{j}" for j in range(1, 9)]
    # once K-fold, the plan stays while anything is flagged, even if fewer are flagged now
    kept = refit_request(k, labels, run="tarns", seed=99, previous=kf)
    assert kept["method"] == "kfold" and kept["kfold"]["folds"] == kf["kfold"]["folds"]
    # share rule: 3 of 20 flagged (> 10 %) -> K-fold with at most n folds
    small = refit_request(np.r_[np.full(17, 0.1), [0.8, 0.9, 1.0]], None, run="s", seed=0, K=4)
    assert small["method"] == "kfold" and len(small["refits"]) == 4


def test_combine_run_exact_refits_newer_wins_and_pending_counts():
    # Source: the same closed-form normal model (BDA3 ch. 2); the totals are those of
    # combine_pointwise (checked above against the formulas of Vehtari, Gelman & Gabry 2017)
    from chainvigil.estimators.refit import combine_run

    y = _data_with_outlier(n=20)
    y[11] = -9.0
    m, t = posterior(y, SIGMA, MU0, TAU0)
    rng = np.random.default_rng(21)
    loo = psis_loo(loglik(y, rng.normal(m, t, size=(4, 500)), SIGMA))
    k = np.full(20, 0.1)
    k[[3, 11]] = 0.9
    req = refit_request(k, None, run="r", seed=0)

    def refit(i, order, finished, folder):
        e, s = exact_elpd(loglik(y[i:i + 1], _refit_draws(y, [i], rng, (4, 20_000)), SIGMA))
        return {"folder": folder, "held_out": [i + 1], "fold": None, "elpd": e, "mcse": s,
                "finished": finished, "order": order, "draws": 80_000}

    old, new, running = refit(3, 1.0, True, "r--refit-4"), refit(3, 2.0, True, "r--refit-4b"), \
        refit(11, 3.0, False, "r--refit-12")
    out = combine_run(loo, req, [new, old, running])
    ref = combine_pointwise(loo["pointwise"], loo["mcse_pointwise"], {3: (new["elpd"][0], new["mcse"][0])},
                            lppd=loo["p_eff"] + loo["elpd"])
    assert out["loo"]["elpd"] == pytest.approx(ref["elpd"]) and out["loo"]["se"] == pytest.approx(ref["se"])
    assert out["loo"]["p_eff"] == pytest.approx(ref["p_eff"])
    assert out["loo"]["method"] == "mixed" and out["exact"] == [3]
    assert (out["loo"]["exact_observations"], out["loo"]["pending_observations"],
            out["loo"]["psis_observations"]) == (1, 1, 19)
    assert out["source"][3] == "exact" and out["source"][11] == "pending" and out["source"][0] == "psis"
    assert out["replaced"] == [("r--refit-4", "r--refit-4b")]
    assert {f["folder"]: f["state"] for f in out["refits"]["folders"]} == {
        "r--refit-4b": "finished", "r--refit-4": "replaced", "r--refit-12": "running"}
    truth = exact_loo(y, SIGMA, MU0, TAU0)
    assert abs(out["pointwise"][3] - truth[3]) < 4 * new["mcse"][0]
    plain = combine_run(loo, None, [])
    assert plain["loo"]["method"] == "psis" and plain["loo"]["elpd"] == pytest.approx(loo["elpd"])
    assert plain["refits"] is None


def test_combine_run_kfold_gives_the_headline_only_when_every_fold_is_in():
    # Source: closed-form K-fold predictive of the conjugate normal model (BDA3 ch. 2, sec. 2.5)
    from chainvigil.estimators.refit import combine_run

    y = _data_with_outlier(n=30, outlier=6.0, seed=8)
    m, t = posterior(y, SIGMA, MU0, TAU0)
    rng = np.random.default_rng(22)
    loo = psis_loo(loglik(y, rng.normal(m, t, size=(4, 500)), SIGMA))
    k = np.full(30, 0.1)
    k[[3, 4, 5, 6]] = 0.8                   # 4 of 30 > 10 %: K-fold
    req = refit_request(k, None, run="r", seed=2, K=3)
    assert req["method"] == "kfold"
    refits = []
    for j, r in enumerate(req["refits"]):
        held = np.array(r["held_out"]) - 1
        e, s = exact_elpd(loglik(y[held], _refit_draws(y, held, rng, (4, 5000)), SIGMA))
        refits.append({"folder": r["folder"], "held_out": r["held_out"], "fold": r["fold"], "elpd": e,
                       "mcse": s, "finished": True, "order": float(j), "draws": 20_000})
    part = combine_run(loo, req, refits[:2])
    assert part["loo"]["method"] == "psis" and part["loo"]["elpd"] == pytest.approx(loo["elpd"])
    assert part["refits"]["folds_missing"] == [3] and part["loo"]["pending_observations"] == 4
    full = combine_run(loo, req, refits)
    assert full["loo"]["method"] == "kfold" and full["exact"] == list(range(30))
    truth = _closed_form_kfold(y, np.array(req["kfold"]["folds"]))
    bound = np.sqrt(sum(full["mcse_pointwise"][np.array(req["kfold"]["folds"]) == f].sum() ** 2
                        for f in (1, 2, 3)))
    assert abs(full["loo"]["elpd"] - truth.sum()) < 4 * bound
    assert full["loo"]["psis_elpd"] == loo["elpd"]
