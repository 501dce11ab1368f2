"""Refits of the simulated tarn models: the posterior without the held-out readings, real processes."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
from scipy import stats

from chainvigil.estimators import mcse_of_mean
from chainvigil.estimators.refit import refit_request
from chainvigil.readers import load_npz_chunk, pending_chunks
from chainvigil.refits import read_refit_info, write_refit_request
from chainvigil.simulated_chains import launch_refits
from chainvigil.simulated_chains.catalog import TarnsPlain, TarnsRobust, get_model, tarn_data
from chainvigil.simulated_chains.chain import run_chain
from chainvigil.simulated_chains.refit import main as refit_main


def _conjugate_level_means(y, group, J, kappa0=0.01, m0=0.0):
    """Posterior mean of each level: (kappa0 m0 + n_j ybar_j) / (kappa0 + n_j) (BDA3 sec. 3.3)."""
    n_j = np.bincount(group, minlength=J)
    return (kappa0 * m0 + np.bincount(group, y, J)) / (kappa0 + n_j)


def test_refit_model_does_not_see_the_held_out_readings():
    # Source: conjugate normal posterior mean of each tarn's level (BDA3 sec. 3.3) computed with
    # numpy from the readings without the misread ones: leaving a reading out moves its tarn's level
    # away from it: m_full - m_rest = (y_i - m_rest) / (n_j + kappa0), m_rest the level's mean without it
    d = tarn_data()
    full = TarnsPlain()
    refit = full.refit(d.misread)
    assert refit.data.n == d.n - 4 and refit.written_n == 4
    assert not set(refit.data.labels) & {d.labels[i] for i in d.misread}
    keep = np.setdiff1d(np.arange(d.n), d.misread)
    expected = _conjugate_level_means(d.y[keep], d.group[keep], d.n_groups)
    got = refit.exact_posterior()["mean"][:d.n_groups]
    assert np.allclose(got, expected, rtol=1e-12)
    before = full.exact_posterior()["mean"][:d.n_groups]
    for i in d.misread:
        g = d.group[i]
        rest = d.y[keep][d.group[keep] == g].mean()
        assert np.sign(got[g] - before[g]) == -np.sign(d.y[i] - rest)
        assert before[g] - got[g] == pytest.approx((d.y[i] - got[g]) / (48 + 0.01), rel=1e-9)
    # the written log-likelihood is that of the held-out readings only, in the order given
    x = np.append(before, np.log(2.0))
    order = d.misread[::-1]
    ll = full.refit(order).written_loglik(x)
    assert np.allclose(ll, stats.norm.logpdf(d.y[order], before[d.group[order]], 2.0))
    with pytest.raises(ValueError, match="distinct"):
        full.refit([3, 3])
    with pytest.raises(ValueError, match="distinct"):
        full.refit([d.n])


def test_robust_refit_chain_writes_held_out_columns_only(tmp_path):
    # Source: the Student-t density (scipy.stats.t) of the held-out readings at the written draws
    d = tarn_data()
    held = [5, 100, 200, 300, 336]          # 1-based
    out = run_chain("tarns-robust", tmp_path / "r", 0, pace=0, draws=60, seed=2, warmup=20, held_out=held)
    assert out["held_out"] == held and out["draws"] == 60
    chunks = pending_chunks(tmp_path / "r" / "chain-1", set())
    batch = [load_npz_chunk(os.path.join(tmp_path / "r" / "chain-1", c)) for c in chunks]
    ll = np.concatenate([b.loglik for b in batch])
    pa = np.concatenate([b.params for b in batch])
    assert ll.shape == (60, 5)
    idx = np.array(held) - 1
    J = d.n_groups
    ref = stats.t.logpdf(d.y[idx], 4.0, loc=pa[:, :J][:, d.group[idx]], scale=pa[:, J:J + 1])
    assert np.allclose(ll, ref, rtol=1e-10)
    refit = TarnsRobust().refit(idx)
    assert refit.data.n == d.n - 5 and refit.written_n == 5
    # the same seed without held-out readings gives a different stream (refits do not share draws)
    run_chain("tarns-robust", tmp_path / "full", 0, pace=0, draws=60, seed=2, warmup=20)
    full = load_npz_chunk(os.path.join(tmp_path / "full" / "chain-1",
                                       pending_chunks(tmp_path / "full" / "chain-1", set())[0]))
    assert full.loglik.shape[1] == d.n and not np.allclose(full.params[0], pa[0])


@pytest.mark.slow
def test_misread_readings_refitted_by_real_processes(tmp_path):
    # Source: the conjugate closed form of the refit posterior (BDA3 sec. 3.3, TarnsPlain.exact_posterior
    # of the refit model) against the chains of real sampler processes started from REFITS.json;
    # MCSE of the chain means from chainvigil.estimators.mcse_of_mean
    d = tarn_data()
    model = get_model("tarns-plain")
    k_hat = np.full(d.n, 0.2)
    k_hat[d.misread] = 0.95
    run = tmp_path / "tarns-plain"
    write_refit_request(run, refit_request(k_hat, list(d.labels), run="tarns-plain", seed=0))
    code = refit_main([str(run / "REFITS.json"), "--pace", "0", "--draws", "1500", "--chains", "2",
                       "--wait"])
    assert code == 0
    assert launch_refits(run) == []          # every refit folder exists: nothing is started twice
    full_mean = model.exact_posterior()["mean"]
    for i in d.misread:
        folder = tmp_path / f"tarns-plain--refit-{i + 1}"
        info = read_refit_info(folder)
        assert info == {"refit_of": "tarns-plain", "held_out": [int(i) + 1], "fold": None}
        raw = json.loads((folder / "run.json").read_text())
        assert raw["observation_labels"] == [d.labels[i]] and "dataset" not in raw
        lls, params = [], []
        for c in (1, 2):
            chain_dir = folder / f"chain-{c}"
            batches = [load_npz_chunk(chain_dir / name) for name in pending_chunks(chain_dir, set())]
            lls.append(np.concatenate([b.loglik for b in batches]))
            params.append(np.concatenate([b.params for b in batches]))
        ll, pa = np.stack(lls), np.stack(params)
        assert ll.shape == (2, 1500, 1)
        g = d.group[i]
        # the column is the held-out reading's density at each draw
        assert np.allclose(ll[..., 0], stats.norm.logpdf(d.y[i], pa[..., g], pa[..., d.n_groups]))
        exact = model.refit([i]).exact_posterior()
        level = pa[..., g]
        mcse = mcse_of_mean(level)
        assert abs(level.mean() - exact["mean"][g]) < 5 * mcse
        # the refit did not see the misread reading: its tarn's level moved away from it
        moved = level.mean() - full_mean[g]
        assert np.sign(moved) == -np.sign(d.y[i] - full_mean[g]) and abs(moved) > 5 * mcse


def test_refit_launcher_starts_each_refit_once_and_records_bad_requests(tmp_path):
    # Real processes (tarns-robust, Gibbs) started from requests found under a root
    from chainvigil.simulated_chains import wait
    from chainvigil.simulated_chains.refit import RefitLauncher

    d = tarn_data()
    k_hat = np.full(d.n, 0.1)
    k_hat[[7, 8]] = 0.9
    write_refit_request(tmp_path / "tarns-robust", refit_request(k_hat, None, run="tarns-robust", seed=0))
    write_refit_request(tmp_path / "hill", refit_request(np.r_[np.full(9, 0.1), 0.9], None, run="hill", seed=0))
    launcher = RefitLauncher(tmp_path, pace=0, draws=50, chains=1, warmup=10)
    first = launcher.poll()
    assert sorted(os.path.basename(p.run_dir) for p in first) == ["tarns-robust--refit-8", "tarns-robust--refit-9"]
    assert len(launcher.problems) == 1 and "hill" in launcher.problems[0][0] and "unknown model" in launcher.problems[0][1]
    assert launcher.poll() == [] and len(launcher.problems) == 1   # nothing twice, the problem once
    assert wait(first, timeout=120) == [0, 0]
    for p in first:
        chunks = pending_chunks(os.path.join(p.run_dir, "chain-1"), set())
        n = sum(load_npz_chunk(os.path.join(p.run_dir, "chain-1", c)).loglik.shape[0] for c in chunks)
        assert n == 50
    launcher.stop()
