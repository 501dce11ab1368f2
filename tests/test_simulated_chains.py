"""Simulated samplers: real processes writing real run folders, checked against closed forms.

The sampler processes are started through the public API (``chainvigil.simulated_chains.launch``) and read back
with numpy only (``np.load(..., allow_pickle=False)`` / ``np.loadtxt``), never through the monitor.
Runs use ``pace=0`` (as fast as the sampler goes) and few draws so each test takes seconds.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import numpy as np
import pytest
from scipy import stats

import chainvigil.simulated_chains as sc
from chainvigil.simulated_chains.samplers import AdaptiveMetropolis, ComponentwiseMetropolis
from chainvigil.simulated_chains.chain import chain_rng
from chainvigil.simulated_chains.catalog import get_model, orchard_data, tarn_data

pytestmark = [pytest.mark.timeout(180), pytest.mark.slow]  # real sampler processes


# ------------------------------------------------------------------------------------------------
# helpers


def read_npz_chain(folder):
    """Concatenate a chain's NPZ chunks in name order: (loglik (S, n), params (S, p), names, chunks)."""
    names = sorted(f for f in os.listdir(folder) if f.endswith(".npz"))
    ll, pa, pn, sizes = [], [], None, []
    for f in names:
        with np.load(os.path.join(folder, f), allow_pickle=False) as z:
            ll.append(z["loglik"])
            pa.append(z["params"])
            pn = tuple(str(s) for s in z["param_names"])
            sizes.append(z["loglik"].shape[0])
    return np.concatenate(ll), np.concatenate(pa), pn, sizes


def read_csv_chain(path):
    """(loglik (S, n), params (S, p), param names) from a chain CSV file."""
    with open(path) as f:
        header = f.readline().rstrip("\n").split(",")
    data = np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2)
    ll_cols = [i for i, h in enumerate(header) if h.startswith("loglik[")]
    p_cols = [i for i, h in enumerate(header) if h != "draw" and not h.startswith("loglik[")]
    assert header[0] == "draw" and [header[i] for i in ll_cols] == [f"loglik[{k}]" for k in
                                                                   range(1, len(ll_cols) + 1)]
    np.testing.assert_array_equal(data[:, 0], np.arange(1, data.shape[0] + 1))
    return data[:, ll_cols], data[:, p_cols], tuple(header[i] for i in p_cols)


def run_and_wait(*args, timeout=120, **kwargs):
    procs = sc.launch(*args, log=subprocess.DEVNULL, **kwargs)
    try:
        codes = sc.wait(procs, timeout=timeout)
    finally:
        sc.stop(procs, grace=2.0)
    assert codes == [0] * len(procs), codes
    return procs


def batch_means_mcse(x, batches=20):
    """Monte Carlo standard error of the mean of x (chains, draws) by non-overlapping batch means
    within each chain (Flegal & Jones 2010, batch means; the standard estimator, from memory)."""
    c, s = x.shape
    b = s // batches
    means = x[:, : b * batches].reshape(c, batches, b).mean(axis=2).ravel()
    return means.std(ddof=1) / np.sqrt(means.size)


# ------------------------------------------------------------------------------------------------
# scenarios and data


def test_scenarios_and_models_are_listed():
    names = sc.scenarios()
    assert set(names) == {"tarn-levels", "orchard-ledger"}
    assert all(isinstance(v, str) and v for v in names.values())
    assert list(sc.models("tarn-levels")) == ["tarns-robust", "tarns-plain", "tarns-sticky"]
    assert list(sc.models("orchard-ledger")) == ["orchard-full", "orchard-lean"]
    with pytest.raises(ValueError, match="known scenarios: tarn-levels, orchard-ledger"):
        sc.models("no-such-place")


def test_data_sets_are_fixed_and_labelled():
    t = tarn_data()
    assert t.n == 336 and len(t.labels) == t.n == len(set(t.labels))
    assert t.labels[0] == "Orrin Tarn, day 1"
    # the four planted misreadings lie far outside the spread of the other readings at their tarn
    for i in t.misread:
        others = t.y[(t.group == t.group[i]) & ~np.isin(np.arange(t.n), t.misread)]
        assert abs(t.y[i] - np.median(others)) > 10 * others.std()
    o = orchard_data()
    assert o.n == 24_000 and o.X.shape == (24_000, 6) and len(o.labels) == o.n
    # generated from a fixed seed: rebuilding gives the same numbers
    tarn_data.cache_clear()
    np.testing.assert_array_equal(tarn_data().y, t.y)


def test_point_loglik_is_the_normal_maximum_likelihood():
    # Normal model: the maximum-likelihood levels are the group means and the ML variance is the
    # pooled within-group sum of squares over n (standard result, e.g. Casella & Berger, Statistical
    # Inference, 2nd ed., example 7.2.11, from memory), so max log-lik = -n/2 (log(2 pi s2) + 1).
    d = tarn_data()
    means = np.bincount(d.group, d.y) / np.bincount(d.group)
    s2 = np.mean((d.y - means[d.group]) ** 2)
    exact = -d.n / 2 * (np.log(2 * np.pi * s2) + 1)
    assert get_model("tarns-plain").point_loglik() == pytest.approx(exact, rel=1e-9, abs=1e-6)
    # ordinary least squares gives the regression maximum the same way
    o = orchard_data()
    X = o.X[:, :4]
    beta, *_ = np.linalg.lstsq(X, o.y, rcond=None)
    s2 = np.mean((o.y - X @ beta) ** 2)
    exact = -o.n / 2 * (np.log(2 * np.pi * s2) + 1)
    assert get_model("orchard-lean").point_loglik() == pytest.approx(exact, rel=1e-9)


# ------------------------------------------------------------------------------------------------
# the kernels on targets with known moments


def test_componentwise_metropolis_recovers_a_correlated_normal():
    # Target: bivariate normal, means (1, -2), sds (1, 2), correlation 0.8 (moments known exactly).
    mean = np.array([1.0, -2.0])
    cov = np.array([[1.0, 0.8 * 2.0], [0.8 * 2.0, 4.0]])
    prec = np.linalg.inv(cov)

    def logp(x):
        r = x - mean
        return -0.5 * r @ prec @ r

    rng = np.random.default_rng(11)
    chains = []
    for _ in range(2):
        k = ComponentwiseMetropolis(logp, rng.normal(0, 3, 2), rng, steps=(1.0, 2.0))
        for _ in range(500):
            k.step()
        k.end_warmup()
        chains.append(np.array([k.step() for _ in range(10_000)]))
        assert 0.2 < k.acceptance < 0.8
    x = np.stack(chains)  # (2, S, 2)
    for j in range(2):
        se = batch_means_mcse(x[..., j])
        assert abs(x[..., j].mean() - mean[j]) < 4 * se
    c = np.corrcoef(x.reshape(-1, 2).T)[0, 1]
    assert c == pytest.approx(0.8, abs=0.05)


def test_adaptive_metropolis_learns_the_covariance_and_freezes_it():
    # Target: 3-d normal with very different scales and a strong correlation.
    sd = np.array([0.01, 1.0, 30.0])
    corr = np.array([[1, 0.9, 0], [0.9, 1, 0], [0, 0, 1.0]])
    cov = corr * np.outer(sd, sd)
    prec = np.linalg.inv(cov)
    rng = np.random.default_rng(5)
    k = AdaptiveMetropolis(lambda x: -0.5 * x @ prec @ x, np.zeros(3), rng, scale0=0.1)
    for _ in range(6000):
        k.step()
    k.end_warmup()
    frozen = k.chol.copy()
    x = np.array([k.step() for _ in range(20_000)])
    np.testing.assert_array_equal(k.chol, frozen)  # no adaptation after warm-up
    # near the optimal random-walk rate for d = 3 (about 0.3; Gelman, Roberts & Gilks 1996)
    assert 0.15 < k.acceptance < 0.5
    # the rejected proposals repeat the current point exactly: the repeat rate is 1 - acceptance
    repeats = np.mean(np.all(x[1:] == x[:-1], axis=1))
    assert repeats == pytest.approx(1 - k.acceptance, abs=0.01)
    for j in range(3):
        se = batch_means_mcse(x[None, :, j])
        assert abs(x[:, j].mean()) < 4 * se
    assert np.corrcoef(x[:, 0], x[:, 1])[0, 1] == pytest.approx(0.9, abs=0.05)
    np.testing.assert_allclose(x.std(axis=0), sd, rtol=0.15)


def test_regression_gibbs_matches_the_conjugate_posterior():
    # Conjugate normal / inverse-gamma regression: beta | y is multivariate t with location
    # V X'y (Gelman et al., Bayesian Data Analysis, 3rd ed., sec. 14.8 with the conjugate prior).
    m = get_model("orchard-lean")
    exact = m.exact_posterior()
    rng = np.random.default_rng(2)
    chains = []
    for _ in range(2):
        k = m.sampler(rng, m.initial(rng))
        for _ in range(20):
            k.step()
        chains.append(np.array([m.output(k.step()) for _ in range(1000)]))
    x = np.stack(chains)[..., :-1]  # (2, 1000, 4) regression effects
    for j in range(x.shape[2]):
        se = batch_means_mcse(x[..., j])
        assert abs(x[..., j].mean() - exact["mean"][j]) < 4 * se
        assert x[..., j].std() == pytest.approx(exact["sd"][j], rel=0.12)


# ------------------------------------------------------------------------------------------------
# real processes


def test_launch_writes_run_folders_with_run_info_and_draws(tmp_path):
    procs = run_and_wait("tarn-levels", tmp_path, pace=0, draws=60, chains=2, seed=5)
    assert len(procs) == 6 and sorted(os.listdir(tmp_path)) == ["tarns-plain", "tarns-robust",
                                                               "tarns-sticky"]
    datasets = set()
    for name in sc.models("tarn-levels"):
        run = tmp_path / name
        model = get_model(name)
        info = json.loads((run / "run.json").read_text())
        assert info["title"] == model.title and info["n_params"] == model.n_params
        assert info["observation_labels"] == list(tarn_data().labels)
        assert np.isfinite(info["point_loglik"])
        datasets.add(info["dataset"])
        assert sorted(p for p in os.listdir(run) if p != "run.json") == ["chain-1", "chain-2"]
        for chain in ("chain-1", "chain-2"):
            ll, pa, names, _ = read_npz_chain(run / chain)
            assert ll.shape == (60, 336) and pa.shape == (60, model.n_params)
            assert names == model.param_names
            assert np.all(np.isfinite(ll))
            # the maximum of the total log-likelihood is at least every draw's total
            assert ll.sum(axis=1).max() <= info["point_loglik"] + 1e-9
    assert datasets == {"orrin-fells-tarn-levels"}  # one data set: the runs are comparable


def test_csv_format_and_the_large_scenario(tmp_path):
    run_and_wait("tarn-levels", tmp_path / "t", pace=0, draws=25, chains=1, fmt="csv",
                 models=["tarns-robust"])
    ll, pa, names = read_csv_chain(tmp_path / "t" / "tarns-robust" / "chain-1.csv")
    assert ll.shape == (25, 336) and pa.shape == (25, 8) and names == get_model("tarns-robust").param_names
    # CSV holds the parameter values written: the spread is positive, loglik matches the model's
    model = get_model("tarns-robust")
    assert np.all(pa[:, -1] > 0)
    np.testing.assert_allclose(ll[3], model.pointwise_loglik(pa[3]), rtol=1e-12)

    run_and_wait("orchard-ledger", tmp_path / "o", pace=0, draws=6, chains=1, models=["orchard-full"])
    ll, pa, names, _ = read_npz_chain(tmp_path / "o" / "orchard-full" / "chain-1")
    assert ll.shape == (6, 24_000) and pa.shape == (6, 7)
    info = json.loads((tmp_path / "o" / "orchard-full" / "run.json").read_text())
    assert len(info["observation_labels"]) == 24_000


def test_conjugate_model_chains_match_the_closed_form_posterior(tmp_path):
    # tarns-plain: normal readings with the conjugate normal / scaled-inverse-chi^2 prior; the exact
    # marginal posteriors are t (levels) and scaled-inverse-chi^2 (variance) (Gelman et al., Bayesian
    # Data Analysis, 3rd ed., sec. 3.3). The chains come from the real sampler processes.
    run_and_wait("tarn-levels", tmp_path, pace=0, draws=6000, chains=2, seed=1,
                 models=["tarns-plain"])
    exact = get_model("tarns-plain").exact_posterior()
    x = np.stack([read_npz_chain(tmp_path / "tarns-plain" / c)[1] for c in ("chain-1", "chain-2")])
    for j in range(x.shape[2]):
        xj = x[..., j]
        se = batch_means_mcse(xj)
        assert abs(xj.mean() - exact["mean"][j]) < 4 * se, (j, xj.mean(), exact["mean"][j], se)
        sq = (xj - exact["mean"][j]) ** 2
        se_var = batch_means_mcse(sq)
        assert abs(sq.mean() - exact["sd"][j] ** 2) < 4 * se_var, (j, np.sqrt(sq.mean()), exact["sd"][j])
    # a random-walk Metropolis chain repeats its point on every rejection: acceptance = 1 - repeats
    for c in range(2):
        moved = np.mean(np.any(x[c, 1:] != x[c, :-1], axis=1))
        assert 0.15 < moved < 0.5, moved


def test_sticky_model_moves_one_component_at_a_time_and_starts_dispersed(tmp_path):
    run_and_wait("tarn-levels", tmp_path, pace=0, draws=400, chains=4, seed=3,
                 models=["tarns-sticky"])
    x = np.stack([read_npz_chain(tmp_path / "tarns-sticky" / f"chain-{c}")[1] for c in range(1, 5)])
    # per-component acceptance within a sweep, read off as the rate at which each value changes
    moved = np.mean(x[:, 1:] != x[:, :-1], axis=(0, 1))
    assert np.all((moved > 0.05) & (moved < 0.95)), moved
    # started apart: early on the chains disagree about the common level by far more than the
    # within-chain spread (this is what keeps R-hat up for a while)
    first = x[:, :100, 0]
    assert first.mean(axis=1).std() > 2 * first.std(axis=1).mean()


def test_enough_json_stops_the_chains_early(tmp_path):
    procs = sc.launch("tarn-levels", tmp_path, pace=40, draws=100_000, chains=2,
                      models=["tarns-robust"], log=subprocess.DEVNULL)
    run = tmp_path / "tarns-robust"
    try:
        deadline = time.monotonic() + 60
        while not all((run / c).is_dir() and os.listdir(run / c) for c in ("chain-1", "chain-2")):
            assert time.monotonic() < deadline, "no draws written within a minute"
            time.sleep(0.1)
        (run / "ENOUGH.json").write_text("{}")
        t_signal = time.monotonic()
        codes = sc.wait(procs, timeout=30)
        assert codes == [0, 0]
        assert time.monotonic() - t_signal < 10
    finally:
        sc.stop(procs, grace=2.0)
    for c in ("chain-1", "chain-2"):
        ll, _, _, sizes = read_npz_chain(run / c)
        assert 0 < ll.shape[0] < 100_000
        assert set(sizes) == {20}  # blocks of pace x 0.5 s draws


def test_pace_sets_the_block_size_and_the_speed(tmp_path):
    t = time.monotonic()
    run_and_wait("tarn-levels", tmp_path, pace=20, draws=30, chains=1, models=["tarns-robust"])
    # 30 draws at 20 per second cannot take less than 1.5 s (the lower bound is what is checked:
    # an upper bound would depend on the load of the machine)
    assert time.monotonic() - t >= 1.5
    _, _, _, sizes = read_npz_chain(tmp_path / "tarns-robust" / "chain-1")
    assert sizes == [10, 10, 10]


def test_same_seed_same_draws_other_seed_other_draws(tmp_path):
    kw = dict(pace=0, draws=40, chains=1, models=["tarns-plain", "tarns-sticky"])
    run_and_wait("tarn-levels", tmp_path / "a", seed=7, **kw)
    run_and_wait("tarn-levels", tmp_path / "b", seed=7, **kw)
    run_and_wait("tarn-levels", tmp_path / "c", seed=8, **kw)
    for m in ("tarns-plain", "tarns-sticky"):
        a, b, c = (read_npz_chain(tmp_path / r / m / "chain-1") for r in "abc")
        np.testing.assert_array_equal(a[0], b[0])
        np.testing.assert_array_equal(a[1], b[1])
        assert not np.array_equal(a[1], c[1])


def test_sigterm_ends_a_chain_cleanly(tmp_path):
    procs = sc.launch("tarn-levels", tmp_path, pace=40, draws=100_000, chains=1,
                      models=["tarns-sticky"], log=subprocess.DEVNULL)
    folder = tmp_path / "tarns-sticky" / "chain-1"
    deadline = time.monotonic() + 60
    while not (folder.is_dir() and os.listdir(folder)):
        assert time.monotonic() < deadline
        time.sleep(0.1)
    with pytest.raises(TimeoutError, match=r"1 sampler process\(es\) still running .*tarns-sticky"):
        sc.wait(procs, timeout=0.2)
    assert procs[0].poll() is None  # a timed-out wait leaves the process running
    assert sc.stop(procs, grace=10.0) == [0]  # the handler lets the process finish and exit 0
    ll, pa, _, _ = read_npz_chain(folder)  # every chunk complete and readable
    assert ll.shape[0] == pa.shape[0] > 0
    assert not [f for f in os.listdir(folder) if not f.endswith(".npz")]


def test_launch_refuses_bad_settings_and_a_used_folder(tmp_path):
    with pytest.raises(ValueError, match="unknown scenario 'moorland'; known scenarios"):
        sc.launch("moorland", tmp_path)
    with pytest.raises(ValueError, match="pace must be"):
        sc.launch("tarn-levels", tmp_path, pace=-1)
    with pytest.raises(ValueError, match="has no model 'tarns-fancy'"):
        sc.launch("tarn-levels", tmp_path, models=["tarns-fancy"])
    (tmp_path / "tarns-plain").mkdir()
    (tmp_path / "tarns-plain" / "chain-1.csv").write_text("draw,loglik[1]\n")
    with pytest.raises(ValueError, match="already holds files"):
        sc.launch("tarn-levels", tmp_path, models=["tarns-plain"])
    assert not (tmp_path / "tarns-robust").exists()  # nothing started, nothing written


def test_cli_help_and_unknown_scenario(tmp_path, capsys):
    with pytest.raises(SystemExit) as e:
        sc.cli_main(["nowhere", str(tmp_path)])
    assert e.value.code == 2
    err = capsys.readouterr().err
    assert "unknown scenario 'nowhere'" in err and "tarn-levels" in err and "orchard-ledger" in err
    out = subprocess.run([sys.executable, "-m", "chainvigil.simulated_chains", "--help"], capture_output=True,
                         text=True, check=True).stdout
    for word in ("--pace", "--draws", "--chains", "--format", "--seed", "--wait", "tarns-sticky",
                 "orchard-ledger"):
        assert word in out


def test_cli_runs_and_waits(tmp_path):
    r = subprocess.run([sys.executable, "-m", "chainvigil.simulated_chains", "tarn-levels", str(tmp_path),
                        "--pace", "0", "--draws", "15", "--chains", "1", "--format", "csv",
                        "--models", "tarns-robust,tarns-sticky", "--wait"],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    assert "started 2 sampler process(es)" in r.stdout
    assert "15 draws after" in r.stderr
    for m in ("tarns-robust", "tarns-sticky"):
        ll, _, _ = read_csv_chain(tmp_path / m / "chain-1.csv")
        assert ll.shape == (15, 336)


def test_warmup_is_written_only_when_asked(tmp_path):
    kw = dict(pace=0, draws=20, chains=1, warmup=30, seed=4, models=["tarns-plain"])
    run_and_wait("tarn-levels", tmp_path / "plain", **kw)
    run_and_wait("tarn-levels", tmp_path / "kept", keep_warmup=True, **kw)
    skipped = read_npz_chain(tmp_path / "plain" / "tarns-plain" / "chain-1")[1]
    kept = read_npz_chain(tmp_path / "kept" / "tarns-plain" / "chain-1")[1]
    assert skipped.shape == (20, 8) and kept.shape == (50, 8)
    # with the warm-up kept, the first written draw is one random-walk step (sd 0.1) from the
    # chain's dispersed starting point; without it, the chain starts writing after warm-up
    model = get_model("tarns-plain")
    x0 = model.output(model.initial(chain_rng(4, model.name, 0)))
    assert np.abs(kept[0, :7] - x0[:7]).max() < 1.0
