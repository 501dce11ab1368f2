"""Refits through the service: REFITS.json out, refit runs in, the mixed / K-fold headline.

Real run folders, real zarr store, real SQLite history; the service driven by ``Service.cycle()``.
The outside check is the closed-form exact LOO of the conjugate normal model (Gelman et al., BDA3
ch. 2; tests/_normal_model.py): a run with one gross outlier (k-hat > 0.7) whose refit is written by
a test sampler drawing from the closed-form posterior without the held-out point.
"""
from __future__ import annotations

import json
import os
import time

import numpy as np
import pytest
from scipy import stats

from _normal_model import exact_loo, posterior
from chainvigil.refits import REFITS_NAME, read_refit_request
from chainvigil.service import Service
from chainvigil.writer import ChainWriter, write_refit_info, write_run_info

SIGMA, MU0, TAU0 = 1.0, 0.0, 10.0
N = 20
OUTLIER = 3  # 0-based; observation 4 in files


def data_with_outlier(seed=2, outlier=12.0):
    y = np.random.default_rng(seed).normal(0.0, SIGMA, N)
    y[OUTLIER] = outlier
    return y


def write_normal_chains(run_dir, y, held_out0, rng, draws, chains=4, blocks=1, columns0=None):
    """Chains of mu drawn from the closed-form posterior of y without ``held_out0`` (BDA3 ch. 2);
    each writes log N(y_i | mu, sigma) of the observations ``columns0`` (default: all)."""
    keep = np.ones(y.size, bool)
    keep[list(held_out0)] = False
    m, t = posterior(y[keep], SIGMA, MU0, TAU0)
    cols = list(range(y.size)) if columns0 is None else list(columns0)
    writers = [ChainWriter(run_dir, f"c{c}", param_names=("mu",)) for c in range(chains)]
    for _ in range(blocks):
        for w in writers:
            mu = rng.normal(m, t, size=(draws, 1))
            w.append(stats.norm.logpdf(y[cols][None, :], mu, SIGMA), mu)
    for w in writers:
        w.close()


def make_run(root, y, rng, name="normal", draws=1000):
    run = root / name
    write_run_info(run, title="normal with an outlier", dataset="normals", n_params=1)
    write_normal_chains(run, y, [], rng, draws)
    return run


def events_of(service, kind):
    return [e for e in service.history.events() if e["kind"] == kind]



def cycles(service, k=1):
    for _ in range(k):
        service.cycle()


def refit_in_blocks(service, folder, y, held_out0, rng, *, blocks=3, draws=1500, columns0=None, fold=None,
                    refit_of="normal", shift=0.0, passes_after=2, chains=4, **info):
    """A test refit sampler: run.json, then chains growing block by block, a service pass after each,
    and ``passes_after`` passes once it stopped. Three blocks of these independent draws are enough
    for the refit's own verdict (two are not)."""
    write_refit_info(folder, refit_of, [i + 1 for i in held_out0], fold=fold, **info)
    writers = [ChainWriter(folder, f"c{c}", param_names=("mu",)) for c in range(chains)]
    keep = np.ones(y.size, bool)
    keep[list(held_out0)] = False
    m, t = posterior(y[keep], SIGMA, MU0, TAU0)
    m += shift
    cols = list(held_out0) if columns0 is None else list(columns0)
    for _ in range(blocks):
        for w in writers:
            mu = rng.normal(m, t, size=(draws, 1))
            w.append(stats.norm.logpdf(y[cols][None, :], mu, SIGMA), mu)
        service.cycle()
    for w in writers:
        w.close()
    cycles(service, passes_after)


def test_request_refit_and_mixed_headline_equal_closed_form_exact_loo(root, tmp_path):
    # Source: closed-form exact LOO of the conjugate normal model (BDA3 ch. 2, tests/_normal_model.py).
    y = data_with_outlier()
    truth = exact_loo(y, SIGMA, MU0, TAU0)
    rng = np.random.default_rng(11)
    called = []
    service = Service(root, every=0.0, on_refits=lambda path, run, folder: called.append((path, run, folder)))
    run = make_run(root, y, rng, draws=250)  # 1000 draws: enough to judge k-hat, few enough to show PSIS's bias
    cycles(service)
    req = read_refit_request(run)
    assert req is not None and req["method"] == "exact"
    assert [r["observation"] for r in req["flagged"]] == [OUTLIER + 1]
    assert [r["held_out"] for r in req["refits"]] == [[OUTLIER + 1]]
    assert called == [(run / REFITS_NAME, "normal", run)]
    assert len(events_of(service, "refits_requested")) == 1
    snap = service.history.latest_snapshot("normal")
    assert snap["loo_method"] == "psis" and snap["loo_pending"] == 1 and snap["loo_exact"] == 0
    assert snap["loo_elpd"] == pytest.approx(snap["loo_psis_elpd"])
    psis_total, psis_mcse = snap["loo_psis_elpd"], snap["loo_mcse"]

    refit_in_blocks(service, root / req["refits"][0]["folder"], y, [OUTLIER], rng)
    refit_row = service.history.run(req["refits"][0]["folder"])
    assert refit_row["refit_of"] == "normal" and refit_row["enough_at"] is not None
    assert (root / req["refits"][0]["folder"] / "ENOUGH.json").is_file()  # the refit sampler may stop

    snap = service.history.latest_snapshot("normal")
    assert snap["loo_method"] == "mixed" and snap["loo_exact"] == 1 and snap["loo_pending"] == 0
    assert snap["loo_psis"] == N - 1
    # the mixed headline equals the closed-form exact LOO total within a few of its MCSE ...
    assert abs(snap["loo_elpd"] - truth.sum()) < 4 * snap["loo_mcse"]
    # ... while plain PSIS-LOO (k-hat > 0.7 at the outlier) is too optimistic by more than twice its own
    # MCSE (the upward bias of PSIS at k-hat > 0.7 is shown over 60 repetitions in test_refit.py; this
    # one run, seed 11, is one of them in kind: 0.47 nats above the closed form)
    assert psis_total - truth.sum() > 2 * psis_mcse
    assert abs(snap["loo_elpd"] - truth.sum()) < abs(psis_total - truth.sum())
    # SE and p_eff come from the combined pointwise values
    pw = service.history.pointwise("normal")
    values = np.array([r["elpd_loo"] for r in pw])
    assert snap["loo_se"] == pytest.approx(np.sqrt(N * values.var(ddof=1)), rel=1e-9)
    assert values[OUTLIER] == pytest.approx(truth[OUTLIER], abs=4 * snap["loo_mcse"])
    assert [r["loo_source"] for r in pw].count("exact") == 1 and pw[OUTLIER]["loo_source"] == "exact"
    # the k-hat check passes for the outlier now that its value is exact; no refit advice, no "needs a look"
    khat = next(c for c in snap["verdict"]["checks"] if c["name"] == "k-hat")
    assert snap["verdict"]["refit"] == [] and khat["ok"] is not False
    assert service.history.run("normal")["state"] != "needs_a_look"
    assert "normal--refit-4" not in {r["run"] for r in service.history.comparisons()}
    # the request stays (k-hat is still high): written once, never rewritten
    assert len(events_of(service, "refits_requested")) == 1 and len(called) == 1
    service.close()


def test_no_request_before_400_draws_and_on_refits_command_gets_the_environment(root, tmp_path):
    y = data_with_outlier()
    rng = np.random.default_rng(3)
    out = tmp_path / "env.json"
    script = tmp_path / "record.py"
    script.write_text("import json, os, sys\n"
                      "json.dump({k: os.environ.get(k) for k in ('CHAINVIGIL_REFITS', 'CHAINVIGIL_RUN', "
                      "'CHAINVIGIL_FOLDER')}, open(sys.argv[1], 'w'))\n")
    import shlex
    import sys
    service = Service(root, every=0.0, on_refits=f"{shlex.quote(sys.executable)} {shlex.quote(str(script))} "
                                                 f"{shlex.quote(str(out))}")
    run = root / "normal-b"
    write_run_info(run, n_params=1)
    keep = np.ones(N, bool)
    m, t = posterior(y, SIGMA, MU0, TAU0)
    writers = [ChainWriter(run, f"c{c}", param_names=("mu",)) for c in range(4)]
    for w in writers:  # 80 draws per chain, 320 in all: k-hat provisional, no request
        mu = rng.normal(m, t, size=(80, 1))
        w.append(stats.norm.logpdf(y[None, :], mu, SIGMA), mu)
    cycles(service)
    assert not (run / REFITS_NAME).exists()
    for w in writers:
        mu = rng.normal(m, t, size=(400, 1))
        w.append(stats.norm.logpdf(y[None, :], mu, SIGMA), mu)
        w.close()
    cycles(service)
    assert (run / REFITS_NAME).is_file()
    for _ in range(100):
        if out.exists() and out.stat().st_size:
            break
        time.sleep(0.05)
    env = json.loads(out.read_text())
    assert env == {"CHAINVIGIL_REFITS": str(run / REFITS_NAME), "CHAINVIGIL_RUN": "normal-b",
                   "CHAINVIGIL_FOLDER": str(run)}
    service.close()


def test_no_refits_flag_writes_nothing_into_run_folders(root):
    y = data_with_outlier()
    service = Service(root, every=0.0, write_refits=False)
    run = make_run(root, y, np.random.default_rng(5))
    cycles(service)
    assert not (run / REFITS_NAME).exists()
    snap = service.history.latest_snapshot("normal")
    assert snap["loo_method"] == "psis" and snap["loo_pending"] == 1
    service.close()


def test_refit_naming_no_run_is_an_event_and_kept_waiting(root):
    y = data_with_outlier()
    rng = np.random.default_rng(6)
    service = Service(root, every=0.0)
    folder = root / "later--refit-4"
    write_refit_info(folder, "later", [OUTLIER + 1])
    write_normal_chains(folder, y, [OUTLIER], rng, 300, columns0=[OUTLIER])
    cycles(service)
    orphan = events_of(service, "refit_orphan")
    assert len(orphan) == 1 and "no run 'later'" in orphan[0]["message"] and orphan[0]["file"].endswith("run.json")
    assert service.history.run("later--refit-4")["refit_of"] == "later"  # ingested, kept
    # the run appears: the refit is used once its request asks for it
    make_run(root, y, rng, name="later")
    cycles(service, 2)
    req = read_refit_request(root / "later")
    assert req["refits"][0]["folder"] == "later--refit-4"
    assert not events_of(service, "refit_mismatch")
    snap = service.history.latest_snapshot("later")
    assert snap["loo_method"] in ("psis", "mixed")  # pending until the refit's own verdict says enough
    service.close()


def test_refit_that_does_not_match_the_request_is_not_used(root):
    y = data_with_outlier()
    rng = np.random.default_rng(8)
    service = Service(root, every=0.0)
    make_run(root, y, rng)
    cycles(service)
    # held out an observation the request does not ask for (one block: refused when first read)
    refit_in_blocks(service, root / "normal--refit-9", y, [8], rng, blocks=1, draws=250)
    # the right observation, but two log-likelihood columns for one held-out observation
    refit_in_blocks(service, root / "normal--refit-4", y, [OUTLIER], rng, blocks=1, draws=250,
                    columns0=[OUTLIER, 0])
    messages = [e["message"] for e in events_of(service, "refit_mismatch")]
    assert any("normal--refit-9" in m and "is not a refit the request" in m for m in messages)
    assert any("normal--refit-4" in m and "2 log-likelihood columns for 1 held-out" in m for m in messages)
    snap = service.history.latest_snapshot("normal")
    assert snap["loo_method"] == "psis" and snap["loo_exact"] == 0 and snap["loo_pending"] == 1
    service.close()


def test_duplicate_refits_of_one_observation_the_newer_wins(root):
    y = data_with_outlier()
    truth = exact_loo(y, SIGMA, MU0, TAU0)
    rng = np.random.default_rng(9)
    service = Service(root, every=0.0)
    make_run(root, y, rng)
    cycles(service)
    refit_in_blocks(service, root / "normal--refit-4", y, [OUTLIER], rng, chains=2, draws=500)
    first = service.history.latest_snapshot("normal")["loo_elpd"]
    # a second refit of the same observation whose draws are shifted: it is newer, so it is used
    older = root / "normal--refit-4" / "run.json"
    os.utime(older, (time.time() - 100, time.time() - 100))
    newer = root / "normal--refit-4-again"
    # a posterior centred 1 sigma higher: what the headline shows tells which refit is used
    refit_in_blocks(service, newer, y, [OUTLIER], rng, shift=1.0, chains=2, draws=500)
    assert service.runs["normal--refit-4-again"].signalled
    replaced = events_of(service, "refit_replaced")
    assert len(replaced) == 1 and "'normal--refit-4-again' replaces 'normal--refit-4'" in replaced[0]["message"]
    pw = service.history.pointwise("normal")
    keep = np.arange(N) != OUTLIER
    m, t = posterior(y[keep], SIGMA, MU0, TAU0)
    expected = float(stats.norm.logpdf(y[OUTLIER], m + 1.0, np.sqrt(SIGMA**2 + t**2)))
    assert pw[OUTLIER]["elpd_loo"] == pytest.approx(expected, abs=0.3)
    assert abs(pw[OUTLIER]["elpd_loo"] - truth[OUTLIER]) > 5
    assert service.history.latest_snapshot("normal")["loo_elpd"] != first
    service.close()


def test_kfold_headline_only_when_every_fold_is_in(root):
    # Three outliers in 20 observations: more than a tenth flagged, so a K-fold plan is requested.
    # Source: the closed-form K-fold value of the conjugate normal model (BDA3 ch. 2): each fold's
    # observations scored by the posterior predictive N(mu_-k, sigma^2 + tau_-k^2) without the fold.
    y = data_with_outlier()
    y[[7, 15]] = [-11.0, 13.0]
    rng = np.random.default_rng(12)
    service = Service(root, every=0.0)
    run = make_run(root, y, rng)
    cycles(service)
    req = read_refit_request(run)
    assert req["method"] == "kfold" and req["kfold"]["K"] == 10
    folds = np.array(req["kfold"]["folds"])
    # each fold's refit: two chains of three blocks of 250 draws (its two held-out observations need no
    # more for the refit's own verdict); the next fold's passes go on for the one before
    for r in req["refits"][:-1]:
        refit_in_blocks(service, root / r["folder"], y, [i - 1 for i in r["held_out"]], rng,
                        fold=r["fold"], chains=2, passes_after=0, draws=250)
    snap = service.history.latest_snapshot("normal")
    assert snap["loo_method"] == "psis"  # until every fold is in
    last = req["refits"][-1]
    refit_in_blocks(service, root / last["folder"], y, [i - 1 for i in last["held_out"]], rng,
                    fold=last["fold"], chains=2, draws=250)
    assert all(service.runs[r["folder"]].signalled for r in req["refits"])
    snap = service.history.latest_snapshot("normal")
    truth = 0.0
    for k in range(1, 11):
        held = folds == k
        m, t = posterior(y[~held], SIGMA, MU0, TAU0)
        truth += stats.norm.logpdf(y[held], m, np.sqrt(SIGMA**2 + t**2)).sum()
    assert snap["loo_method"] == "kfold" and snap["loo_exact"] == N and snap["loo_pending"] == 0
    assert abs(snap["loo_elpd"] - truth) < 4 * snap["loo_mcse"]
    assert {r["loo_source"] for r in service.history.pointwise("normal")} == {"kfold"}
    service.close()


def requested_refit(root):
    """A service whose run 'normal' asked for the outlier's refit, and that refit's writers:
    ``(service, refit folder, grow_refit, writers)``; ``grow_refit()`` appends 1,500 draws to each
    of its 4 chains from the closed-form posterior without the outlier (BDA3 ch. 2)."""
    y = data_with_outlier()
    rng = np.random.default_rng(11)
    service = Service(root, every=0.0)
    run = make_run(root, y, rng, draws=250)
    cycles(service)
    folder = root / read_refit_request(run)["refits"][0]["folder"]
    write_refit_info(folder, "normal", [OUTLIER + 1])
    writers = [ChainWriter(folder, f"c{c}", param_names=("mu",)) for c in range(4)]
    keep = np.ones(y.size, bool)
    keep[OUTLIER] = False
    m, t = posterior(y[keep], SIGMA, MU0, TAU0)

    def grow_refit():
        for w in writers:
            mu = rng.normal(m, t, size=(1500, 1))
            w.append(stats.norm.logpdf(y[[OUTLIER]][None, :], mu, SIGMA), mu)

    return service, folder, grow_refit, writers


def test_a_refit_that_finishes_counts_in_its_runs_headline_of_the_same_pass(root):
    """Refit runs are scored and judged before the models in a pass: the pass in which a refit
    reaches its verdict already shows its exact value in the parent's headline (no lag of a pass)."""
    service, folder, grow_refit, writers = requested_refit(root)
    for _ in range(6):
        grow_refit()
        service.cycle()
        if service.history.run(folder.name)["enough_at"] is not None:
            break  # the pass in which the refit reached its verdict
    else:
        pytest.fail("the refit never reached its verdict")
    for w in writers:
        w.close()
    snap = service.history.latest_snapshot("normal")
    assert snap["loo_method"] == "mixed" and snap["loo_exact"] == 1 and snap["loo_pending"] == 0
    service.close()


def test_a_refit_that_finished_after_its_runs_last_snapshot_is_counted_after_a_restart(root):
    """The service may stop between a refit's stop signal and its run's next snapshot (killed).  The
    refit does not grow again, so after a restart nothing else would score the run: the restart
    itself must make the run due, so its headline counts the finished refit."""
    service, folder, grow_refit, writers = requested_refit(root)
    for _ in range(6):  # only the refit is scored: the service stops before its run's next snapshot
        grow_refit()
        service.scan()
        service.take_snapshot(service.runs[folder.name])
        service.ingest.commit_pending()
        if service.history.run(folder.name)["enough_at"] is not None:
            break
    else:
        pytest.fail("the refit never reached its verdict")
    for w in writers:
        w.close()
    assert service.history.latest_snapshot("normal")["loo_exact"] == 0  # the window a kill can hit
    service.close()
    service.history.close()

    restarted = Service(root, every=0.0)
    restarted.cycle()
    snap = restarted.history.latest_snapshot("normal")
    assert snap["loo_method"] == "mixed" and snap["loo_exact"] == 1 and snap["loo_pending"] == 0
    restarted.cycle()  # once: no new row for the run while nothing changes
    assert restarted.history.latest_snapshot("normal")["id"] == snap["id"]
    restarted.close()
