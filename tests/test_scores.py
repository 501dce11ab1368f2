"""Scores / batch_scores: JSON shape of docs/interfaces.md, flags, mixing through the mixing module."""

import json

import numpy as np
import pytest

from _normal_model import loglik, posterior
from chainvigil.estimators import Scores, batch_scores, psis_loo, waic
from chainvigil.estimators.mixing import mixing_summary


def _run(seed=0):
    rng = np.random.default_rng(seed)
    y = rng.normal(0, 1, 25)
    mu_n, tau_n = posterior(y, 1.0, 0.0, 10.0)
    mu = rng.normal(mu_n, tau_n, size=(4, 300))
    return y, mu, loglik(y, mu, 1.0)


def test_batch_scores_parts_equal_the_single_estimators():
    # Source: psis_loo / waic (checked against closed forms in their own tests)
    _, _, ll = _run()
    sc = batch_scores(ll, 0.9, n_params=1, run="m1")
    lo, wa = psis_loo(ll, 0.9), waic(ll)
    assert sc.loo["elpd"] == lo["elpd"] and sc.loo["mcse"] == lo["mcse"]
    assert sc.waic["elpd"] == wa["elpd"] and np.array_equal(sc.pareto_k, lo["pareto_k"])
    assert sc.chains == 4 and sc.draws == 1200 and sc.observations == 25 and sc.run == "m1"
    assert np.all(sc.r_eff == 0.9)


def test_to_dict_shape_and_json_without_nan():
    y, mu, ll = _run(1)
    ll = ll.copy()
    ll[0, 3, 7] = np.nan
    sc = batch_scores(ll, 1.0, params=mu[..., None], param_names=["mu"])
    d = sc.to_dict()
    assert set(d) >= {"run", "chains", "draws", "observations", "loo", "waic", "dic", "aic", "pareto_k",
                      "pointwise", "mixing", "verdict"}
    assert set(d["loo"]) == {"elpd", "se", "mcse", "p_eff", "mcse_independent", "mcse_method"} and set(d["waic"]) == {"elpd", "se", "p_eff"}
    assert set(d["dic"]) == {"elpd", "p_eff"} and d["aic"] is None
    assert set(d["pareto_k"]) == {"max", "threshold", "above", "above_observations", "values"}
    assert d["pareto_k"]["above"] == len(d["pareto_k"]["above_observations"])
    assert len(d["pointwise"]["loo"]) == 25 and len(d["pareto_k"]["values"]) == 25
    # the bad observation is named; totals are missing, never a partial sum
    assert d["flags"]["bad_observations"] == [7] and d["loo"]["elpd"] is None
    assert 7 in d["pareto_k"]["above_observations"] and d["pointwise"]["loo"][7] is None
    json.dumps(d, allow_nan=False)
    # score --json only adds fields: the 1-based numbers people read, beside the 0-based indices
    from chainvigil.cli import score_record

    k = score_record(d)["pareto_k"]
    assert {key: k[key] for key in d["pareto_k"]} == d["pareto_k"]
    assert k["above_observations_1based"] == [i + 1 for i in d["pareto_k"]["above_observations"]]
    assert 8 in k["above_observations_1based"]
    # Source for mixing: the mixing module's own summary of the same draws
    assert d["mixing"] == mixing_summary(mu[..., None], ["mu"])
    sc.verdict = {"enough": False, "checks": []}
    assert sc.to_dict()["verdict"] == {"enough": False, "checks": []}
    assert not sc.complete


def test_threshold_list_and_default_param_names():
    _, mu, ll = _run(2)
    sc = batch_scores(ll[:, :50], 1.0, params=np.stack([mu[:, :50], mu[:, :50] ** 2], axis=-1))
    assert set(sc.mixing["params"]) == {"param[1]", "param[2]"}
    assert sc.k_threshold == pytest.approx(min(1 - 1 / np.log10(200), 0.7))  # Vehtari et al. 2024
    # one name per concept: above_observations lists (0-based), k_above counts, as in JSON and SQLite
    assert sc.above_observations == np.flatnonzero(sc.pareto_k > sc.k_threshold).tolist()
    assert sc.k_above == len(sc.above_observations) and isinstance(sc.k_above, int)


def test_wrong_shapes_raise():
    with pytest.raises(ValueError, match="shape"):
        batch_scores(np.zeros(7))
    _, mu, ll = _run(3)
    with pytest.raises(ValueError, match="params"):
        batch_scores(ll, 1.0, params=mu[:, :10, None])
    assert isinstance(batch_scores(ll[0], 1.0), Scores)  # 2-D is one chain


def test_score_json_gives_each_parameter_its_spread_interval_and_chains(tmp_path, capsys):
    # `chainvigil score RUN --json`: mixing.params[name] carries sd, q05, q95 and the per-chain
    # figures, computed from the draws as written (outside reference: numpy)
    from chainvigil import cli
    from chainvigil.writer import ChainWriter

    rng = np.random.default_rng(21)
    run = tmp_path / "lakes"
    mus = []
    for chain in ("c1", "c2", "c3"):
        mu = rng.normal(0.5, 0.2, 60)
        ll = -0.5 * (rng.normal(0.5, 1.0, 12)[None, :] - mu[:, None]) ** 2
        with ChainWriter(run, chain, param_names=("mu",)) as w:
            w.append(ll, mu[:, None])
        mus.append(mu)
    assert cli.main(["score", str(run), "--json"]) == 0
    record = json.loads(capsys.readouterr().out)
    mu = record["mixing"]["params"]["mu"]
    draws = np.stack(mus)
    assert mu["sd"] == pytest.approx(np.std(draws, ddof=1), rel=1e-6)
    assert (mu["q05"], mu["q95"]) == pytest.approx(tuple(np.quantile(draws, [0.05, 0.95])), rel=1e-6)
    assert mu["chain_means"] == pytest.approx(draws.mean(axis=1).tolist(), rel=1e-6)
    assert mu["chain_sds"] == pytest.approx(draws.std(axis=1, ddof=1).tolist(), rel=1e-6)
