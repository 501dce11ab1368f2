"""Read options through the real service: warm-up, thinning, log-likelihood name and parameter choice
from run.json over the root defaults, kept across restarts (real files, zarr store, SQLite history).

Every scenario here is invented: a normal model y_i ~ N(mu, sigma) of a short series of made-up
readings, with warm-up draws that wander far from the posterior so that scoring them would show.
"""
from __future__ import annotations

import json
import shutil

import numpy as np
import pytest

from _reference import streaming_r_eff
from chainvigil.cli import main as cli_main
from chainvigil.estimators import batch_scores
from chainvigil.estimators.mixing import mixing_summary
from chainvigil.oneshot import read_run_folder, score_chains
from chainvigil.readers import ReadOptions
from chainvigil.service import Service
from chainvigil.writer import ChainWriter

N_OBS = 12
Y = np.linspace(-1.5, 1.5, N_OBS)



def normal_draws(rng, draws, *, centre=0.0, spread=0.3, sigma=1.0):
    """mu draws and the pointwise log-likelihoods log N(y_i | mu, sigma) at them: (draws, 1), (draws, n)."""
    mu = rng.normal(centre, spread, size=(draws, 1))
    ll = -0.5 * np.log(2 * np.pi * sigma ** 2) - 0.5 * (Y[None, :] - mu) ** 2 / sigma ** 2
    return mu, ll


def write_json(path, obj):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(obj))


def service_on(root, **kw):
    kw.setdefault("every", 0.0)
    return Service(root, **kw)


def events_of(service, kind):
    return [e for e in service.history.events() if e["kind"] == kind]



# ---------------------------------------------------------------- warm-up left out of every score

def test_a_warmup_run_scores_like_score_json_and_batch_scores_on_post_warmup_draws(root, capsys):
    rng = np.random.default_rng(11)
    run = root / "gauge-series"
    write_json(run / "run.json", {"title": "gauge series", "dataset": "gauges", "n_params": 1,
                                  "warmup": 100})
    kept_ll, kept_mu, all_ll = [], [], []
    for c, fmt in enumerate(("csv", "npz", "npz")):
        warm_mu, warm_ll = normal_draws(rng, 100, centre=3.0 + c, spread=1.0)  # far from the posterior
        mu, ll = normal_draws(rng, 300)
        with ChainWriter(run, f"c{c}", param_names=("mu",), fmt=fmt) as writer:
            writer.append(warm_ll[:60], warm_mu[:60])
            writer.append(np.vstack([warm_ll[60:], ll[:150]]), np.vstack([warm_mu[60:], mu[:150]]))
            writer.append(ll[150:], mu[150:])
        kept_ll.append(ll)
        kept_mu.append(mu)
        all_ll.append(np.vstack([warm_ll, ll]))
    service = service_on(root)
    service.cycle(force=True)
    snap = service.history.latest_snapshot("gauge-series")
    # counts are post-warm-up; the store keeps every row; the chains table says what was left out
    assert (snap["draws"], snap["draws_per_chain"], snap["chains"]) == (900, 300, 3)
    assert [service.store.length("gauge-series", f"c{c}") for c in range(3)] == [400, 400, 400]
    assert [(ch["chain"], ch["warmup"], ch["draws"]) for ch in service.history.chains("gauge-series")] == \
        [("c0", 100, 400), ("c1", 100, 400), ("c2", 100, 400)]
    assert service.history.run("gauge-series")["read_options"]["warmup"] == 100

    # batch_scores on the post-warm-up draws only (docs/numerics.md: streaming equals batch)
    batch = batch_scores(np.stack(kept_ll), r_eff=streaming_r_eff(np.stack(kept_ll)), n_params=1).to_dict()
    mixing = mixing_summary(np.stack(kept_mu), ["mu"])
    # score --json on the folder (the same run.json is followed)
    assert cli_main(["score", str(run), "--json"]) == 0
    one_shot = json.loads(capsys.readouterr().out)
    assert one_shot["draws"] == 900
    assert one_shot["warmup"] == {"draws": 300, "per_chain": {"c0": 100, "c1": 100, "c2": 100}}
    # loo.mcse: the joint MCSE comes from the store pass over the post-warm-up draws, which runs off
    # the loop; once it has covered these draws, a snapshot of them carries it exactly
    assert service.passes.worker.wait(60)
    service.take_snapshot(service.runs["gauge-series"])
    assert service.passes.worker.wait(60)
    joint = service.take_snapshot(service.runs["gauge-series"])["loo"]["mcse"]
    for ref in (batch, one_shot):
        for part in ("loo", "waic"):
            for key in ("elpd", "se", "p_eff"):
                assert snap[f"{part}_{key}"] == pytest.approx(ref[part][key], rel=1e-9, abs=1e-12)
        assert joint == pytest.approx(ref["loo"]["mcse"], rel=1e-9)
        assert snap["k_max"] == pytest.approx(ref["pareto_k"]["max"], rel=1e-9)
    for key in ("rhat_max", "ess_bulk_min", "ess_tail_min"):
        assert snap[key] == pytest.approx(mixing[key], rel=1e-9)
        assert snap[key] == pytest.approx(one_shot["mixing"][key], rel=1e-9)
    (row,) = service.history.mixing(snap["id"])
    for key in ("mean", "mcse", "rhat", "ess_bulk", "ess_tail"):
        assert row[key] == pytest.approx(mixing["params"]["mu"][key], rel=1e-9)
    # the warm-up draws would have changed the scores: the comparison above can fail
    with_warmup = batch_scores(np.stack(all_ll), r_eff=None).to_dict()
    assert abs(with_warmup["loo"]["elpd"] - snap["loo_elpd"]) > 1.0
    service.close()


def test_the_tail_rebuild_rereads_post_warmup_draws_only(root):
    """Enough draws that the PSIS tail buffer must grow (a rebuild from the store), and a restart (the
    scorer rebuilt from the store): warm-up rows stay out of both, the scores equal batch_scores on the
    post-warm-up draws."""
    rng = np.random.default_rng(12)
    run = root / "r"
    write_json(run / "run.json", {"warmup": 40})
    kept = []
    for c in range(2):
        warm_mu, warm_ll = normal_draws(rng, 40, centre=-4.0, spread=2.0)
        mu, ll = normal_draws(rng, 16000)
        with ChainWriter(run, f"c{c}", param_names=("mu",), fmt="npz") as writer:
            writer.append(np.vstack([warm_ll, ll]), np.vstack([warm_mu, mu]))
        kept.append(ll)
    first = service_on(root)
    first.cycle(force=True)
    assert first.runs["r"].scorer.rebuilds >= 1 and events_of(first, "rebuild")
    before = first.history.latest_snapshot("r")
    batch = batch_scores(np.stack(kept), r_eff=streaming_r_eff(np.stack(kept))).to_dict()
    assert before["draws"] == 32000
    assert before["loo_elpd"] == pytest.approx(batch["loo"]["elpd"], rel=1e-9)
    assert before["k_max"] == pytest.approx(batch["pareto_k"]["max"], rel=1e-9)
    first.close()
    again = service_on(root)
    state = again.runs["r"]
    assert state.scorer.draws == 32000
    scores = state.scorer.scores(r_eff=batch["r_eff"]).to_dict()
    assert scores["waic"]["elpd"] == pytest.approx(batch["waic"]["elpd"], rel=1e-9)
    assert scores["loo"]["elpd"] == pytest.approx(batch["loo"]["elpd"], rel=1e-9)
    again.close()


# ---------------------------------------------------------------- restart mid-warm-up

def csv_lines(draws, ll, mu):
    return "".join(f"{d},{m:.17g}," + ",".join(f"{v:.17g}" for v in row) + "\n"
                   for d, m, row in zip(draws, mu[:, 0], ll))


def test_a_restart_mid_warmup_keeps_exactly_the_draws_of_an_uninterrupted_read(tmp_path):
    """warmup 50, thin 3: draws arrive in pieces across two restarts (a new Service on the same state
    each time) and the stored draws equal one uninterrupted read of the finished folder."""
    rng = np.random.default_rng(21)
    mu, ll = normal_draws(rng, 150, spread=1.0)
    draws = np.arange(1, 151)
    header = "draw,mu," + ",".join(f"log_lik.{i + 1}" for i in range(N_OBS)) + "\n"
    root = tmp_path / "root"
    run = root / "stepwise"
    write_json(run / "run.json", {"warmup": 50, "thin": 3})
    defaults = ReadOptions(loglik="log_lik")  # the root's default: recovery re-parses the header with it
    (run / "a.csv").write_text(header)
    (run / "b").mkdir()
    cuts = [(0, 30), (30, 70), (70, 150)]
    for k, (lo, hi) in enumerate(cuts):
        with open(run / "a.csv", "a") as f:
            f.write(csv_lines(draws[lo:hi], ll[lo:hi], mu[lo:hi]))
        np.savez(run / "b" / f"{k + 1:08d}.npz", log_lik=ll[lo:hi], params=mu[lo:hi],
                 param_names=np.array(["mu"]), draw=draws[lo:hi])
        service = service_on(root, read_defaults=defaults)
        service.cycle(force=True)
        if k == 0:  # mid-warm-up: everything stored, nothing scored yet
            assert service.store.length("stepwise", "a") == 30 and service.runs["stepwise"].scorer.draws == 0
            assert service.history.latest_snapshot("stepwise") is None
            assert service.history.committed("stepwise", "a")["position"] == 30
        service.close()

    whole = tmp_path / "whole"
    shutil.copytree(run, whole / "stepwise")
    reference = service_on(whole, read_defaults=defaults)
    reference.cycle(force=True)
    again = service_on(root, read_defaults=defaults)
    # kept: positions 0..49 (warm-up), then 50, 53, ..., 149 -> draw numbers 1..50, 51, 54, ..., 150
    expected_ids = np.concatenate([np.arange(1, 51), np.arange(51, 151, 3)])
    for chain in ("a", "b"):
        np.testing.assert_array_equal(again.store.read_draw_ids("stepwise", chain), expected_ids)
        np.testing.assert_array_equal(again.store.read_draw_ids("stepwise", chain),
                                      reference.store.read_draw_ids("stepwise", chain))
        np.testing.assert_array_equal(again.store.read_loglik("stepwise", chain),
                                      reference.store.read_loglik("stepwise", chain))
        committed = again.history.committed("stepwise", chain)
        assert (committed["draws"], committed["warmup"], committed["position"], committed["last_draw"]) == \
            (84, 50, 150, 150)
    assert again.history.latest_snapshot("stepwise")["draws"] == \
        reference.history.latest_snapshot("stepwise")["draws"] == 68
    assert again.history.latest_snapshot("stepwise")["loo_elpd"] == \
        pytest.approx(reference.history.latest_snapshot("stepwise")["loo_elpd"], rel=1e-12)
    # the draw-order check survives the restarts: a repeated draw number is refused
    with open(run / "a.csv", "a") as f:
        f.write(csv_lines([150, 151], ll[:2], mu[:2]))
    again.cycle(force=True)
    assert len(events_of(again, "draw_order")) == 1
    assert again.store.read_draw_ids("stepwise", "a")[-1] == 150  # 151 is position 151: thinned out
    assert again.history.committed("stepwise", "a")["position"] == 151
    again.close()
    reference.close()


def test_a_chain_whose_first_lines_were_all_refused_is_read_after_a_restart(root):
    """The commit log holds the chain (its offset) before any draw was accepted: a restart resumes it
    as the CSV chain it is, with the parameter columns still to be learnt from its first draws."""
    run = root / "shaky"
    run.mkdir()
    (run / "c.csv").write_text("draw,mu,log_lik.1\n1,oops,-1.5\n")
    first = service_on(root, read_defaults=ReadOptions(loglik="log_lik"))
    first.cycle(force=True)
    assert len(events_of(first, "non_numeric")) == 1
    first.close()
    with open(run / "c.csv", "a") as f:
        f.write("".join(f"{d},{0.1 * d},{-1.0 - 0.01 * d}\n" for d in range(2, 12)))
    again = service_on(root, read_defaults=ReadOptions(loglik="log_lik"))
    again.cycle(force=True)
    assert events_of(again, "not_ours") == [] and events_of(again, "header_changed") == []
    np.testing.assert_array_equal(again.store.read_draw_ids("shaky", "c"), np.arange(2, 12))
    assert again.history.chains("shaky")[0]["param_names"] == ["mu"]
    again.close()


# ---------------------------------------------------------------- a generic sampler writing CSV

BOOKKEEPING = ("lp__", "accept_stat__", "stepsize__", "treedepth__", "n_leapfrog__", "divergent__",
               "energy__")


def generic_csv_rows(rng, mu, sigma, ll):
    """Rows of a generic sampler: bookkeeping__, mu, sigma, log_lik.1..n, y_rep.1..n."""
    draws = mu.shape[0]
    book = np.column_stack([ll.sum(axis=1), rng.uniform(0.6, 1.0, draws), np.full(draws, 0.4),
                            rng.integers(1, 5, draws), rng.integers(3, 31, draws), np.zeros(draws),
                            rng.normal(10, 2, draws)])
    y_rep = rng.normal(mu, sigma, size=(draws, N_OBS))
    table = np.column_stack([book, mu, sigma, ll, y_rep])
    return "".join(",".join(f"{v:.17g}" for v in row) + "\n" for row in table)


def test_a_generic_sampler_csv_needs_three_lines_of_run_json(root):
    """The README's scenario: bookkeeping columns ending in __, log_lik.1..n, 1000 warm-up draws and
    y_rep.* columns, written as the sampler goes; run.json says log_lik, warm-up 1000, ignore y_rep*."""
    rng = np.random.default_rng(31)
    run = root / "river-stage"
    run.mkdir()
    (run / "run.json").write_text('{"loglik": "log_lik",\n "warmup": 1000,\n "ignore": ["y_rep*"]}\n')
    header = ",".join([*BOOKKEEPING, "mu", "sigma", *[f"log_lik.{i}" for i in range(1, N_OBS + 1)],
                       *[f"y_rep.{i}" for i in range(1, N_OBS + 1)]]) + "\n"
    kept_ll, kept_params = [], []
    for c in (1, 2):
        sigma_w = rng.uniform(0.5, 4.0, size=(1000, 1))
        mu_w, ll_w = normal_draws(rng, 1000, centre=2.5 * c, spread=1.5)
        with open(run / f"chain{c}.csv", "w") as f:
            f.write(header + generic_csv_rows(rng, mu_w, sigma_w, ll_w))
        kept_ll.append([])
        kept_params.append([])
    service = service_on(root)
    service.cycle(force=True)  # only warm-up so far: stored, nothing scored
    assert service.store.length("river-stage", "chain1") == 1000
    assert service.history.latest_snapshot("river-stage") is None
    for piece in range(2):  # the sampler goes on writing
        for c in (1, 2):
            sigma = np.exp(rng.normal(0.0, 0.1, size=(150, 1)))
            mu = rng.normal(0.0, 0.3, size=(150, 1))
            ll = -0.5 * np.log(2 * np.pi * sigma ** 2) - 0.5 * (Y[None, :] - mu) ** 2 / sigma ** 2
            with open(run / f"chain{c}.csv", "a") as f:
                f.write(generic_csv_rows(rng, mu, sigma, ll))
            kept_ll[c - 1].append(ll)
            kept_params[c - 1].append(np.column_stack([mu, sigma]))
        service.cycle(force=True)
    snap = service.history.latest_snapshot("river-stage")
    assert (snap["draws"], snap["draws_per_chain"]) == (600, 300)
    # the parameters: mu and sigma only (no bookkeeping __ columns, no y_rep*)
    assert [(ch["param_names"], ch["warmup"]) for ch in service.history.chains("river-stage")] == \
        [(["mu", "sigma"], 1000), (["mu", "sigma"], 1000)]
    assert [m["param"] for m in service.history.mixing(snap["id"])] == ["mu", "sigma"]
    # the scores use log_lik only and skip warm-up: batch scores of exactly those draws
    loglik = np.stack([np.vstack(blocks) for blocks in kept_ll])
    params = np.stack([np.vstack(blocks) for blocks in kept_params])
    batch = batch_scores(loglik, r_eff=streaming_r_eff(loglik)).to_dict()
    mixing = mixing_summary(params, ["mu", "sigma"])
    for part in ("loo", "waic"):
        for key in ("elpd", "se", "p_eff"):
            assert snap[f"{part}_{key}"] == pytest.approx(batch[part][key], rel=1e-9)
    assert snap["k_max"] == pytest.approx(batch["pareto_k"]["max"], rel=1e-9)
    assert snap["rhat_max"] == pytest.approx(mixing["rhat_max"], rel=1e-9)
    assert snap["ess_bulk_min"] == pytest.approx(mixing["ess_bulk_min"], rel=1e-9)
    service.close()


# ---------------------------------------------------------------- run.json and root defaults

def test_run_json_overrides_root_defaults_and_options_stay_fixed_once_draws_are_stored(root):
    rng = np.random.default_rng(41)
    run = root / "fixed"
    write_json(run / "run.json", {"warmup": 10})
    mu, ll = normal_draws(rng, 60)
    with ChainWriter(run, "c", param_names=("mu",), fmt="npz") as writer:
        writer.append(ll[:30], mu[:30])
    service = service_on(root, read_defaults=ReadOptions(warmup=5, thin=2))
    service.cycle(force=True)
    # run.json's warmup 10 overrides the default 5; the default thin 2 stays
    assert service.history.run("fixed")["read_options"] == {"loglik": "loglik", "warmup": 10, "thin": 2,
                                                             "params": None, "ignore": []}
    assert service.history.chains("fixed")[0]["warmup"] == 10
    assert service.history.latest_snapshot("fixed")["draws"] == 10  # positions 10, 12, ..., 28
    # run.json changes after draws were read: an event, and the run keeps its options
    write_json(run / "run.json", {"warmup": 20, "title": "changed"})
    with ChainWriter(run, "c", param_names=("mu",), fmt="npz") as writer:
        writer.append(ll[30:], mu[30:])
    service.cycle(force=True)
    changed = events_of(service, "options_changed")
    assert len(changed) == 1 and "run.json" in changed[0]["message"] and "warmup 10 -> 20" in changed[0]["message"]
    assert service.history.chains("fixed")[0]["warmup"] == 10
    assert service.history.latest_snapshot("fixed")["draws"] == 25  # positions 10, 12, ..., 58
    service.close()
    # after a restart the recorded options are used, and the event is not repeated for nothing
    again = service_on(root, read_defaults=ReadOptions(warmup=5, thin=2))
    again.cycle(force=True)
    assert again.ingest.options_of(again.runs["fixed"]) == ReadOptions(warmup=10, thin=2)
    again.close()


def test_changed_command_line_defaults_do_not_change_a_run_already_read(root):
    rng = np.random.default_rng(46)
    run = root / "plain"
    mu, ll = normal_draws(rng, 40)
    with ChainWriter(run, "c", param_names=("mu",), fmt="npz") as writer:
        writer.append(ll, mu)
    first = service_on(root, read_defaults=ReadOptions(warmup=10))
    first.cycle(force=True)
    first.close()
    with ChainWriter(run, "c", param_names=("mu",), fmt="npz") as writer:
        writer.append(ll, mu)
    again = service_on(root, read_defaults=ReadOptions(warmup=30))
    again.cycle(force=True)
    again.cycle(force=True)
    changed = events_of(again, "options_changed")
    assert len(changed) == 1 and "warmup 10 -> 30" in changed[0]["message"]
    assert again.history.chains("plain")[0]["warmup"] == 10
    assert again.history.latest_snapshot("plain")["draws"] == 70
    again.close()


def test_options_given_before_any_draw_are_taken_when_run_json_arrives_late(root):
    rng = np.random.default_rng(42)
    run = root / "late"
    run.mkdir()
    header = "draw,mu," + ",".join(f"log_lik[{i + 1}]" for i in range(N_OBS)) + "\n"
    (run / "c.csv").write_text(header)
    service = service_on(root)
    service.cycle(force=True)  # the header only, read with the default loglik name: nothing usable yet
    write_json(run / "run.json", {"loglik": "log_lik", "warmup": 4})
    mu, ll = normal_draws(rng, 20)
    with open(run / "c.csv", "a") as f:
        f.write(csv_lines(np.arange(1, 21), ll, mu))
    service.cycle(force=True)
    assert service.history.chains("late")[0]["warmup"] == 4
    assert service.history.latest_snapshot("late")["draws"] == 16
    assert events_of(service, "options_changed") == []
    service.close()


def test_each_bad_run_json_field_is_an_event_once_per_change(root):
    rng = np.random.default_rng(43)
    run = root / "sloppy"
    write_json(run / "run.json", {"n_params": -4, "thin": 0, "title": "sloppy"})
    mu, ll = normal_draws(rng, 40)
    with ChainWriter(run, "c", param_names=("mu",), fmt="npz") as writer:
        writer.append(ll, mu)
    service = service_on(root)
    service.cycle(force=True)
    service.cycle(force=True)
    bad = events_of(service, "bad_run_info")
    assert len(bad) == 2
    assert any("'n_params'" in e["message"] for e in bad) and any("'thin'" in e["message"] for e in bad)
    assert all(e["file"].endswith("run.json") and e["run"] == "sloppy" for e in bad)
    assert service.history.run("sloppy")["title"] == "sloppy"  # the good fields are kept
    write_json(run / "run.json", {"n_params": -4, "thin": 0, "title": "sloppy, again"})
    service.cycle(force=True)
    assert len(events_of(service, "bad_run_info")) == 4  # recorded again for the changed file
    service.close()


def test_two_index_log_likelihood_names_give_i_j_labels(root):
    rng = np.random.default_rng(44)
    run = root / "grid"
    run.mkdir()
    mu, ll = normal_draws(rng, 30)  # 12 observations as a 3 x 4 grid
    names = [f"loglik[{i},{j}]" for i in range(1, 4) for j in range(1, 5)]
    (run / "c.csv").write_text("draw,mu," + ",".join(f'"{n}"' for n in names) + "\n"
                               + csv_lines(np.arange(1, 31), ll, mu))
    service = service_on(root)
    service.cycle(force=True)
    labels = [p["label"] for p in service.history.pointwise("grid")]
    assert labels == [f"{i},{j}" for i in range(1, 4) for j in range(1, 5)]
    assert service.history.run("grid")["labels"] == labels
    service.close()


def test_command_line_read_flags_are_root_defaults_for_score(root, capsys):
    rng = np.random.default_rng(45)
    run = root / "flags"
    run.mkdir()
    mu, ll = normal_draws(rng, 50)
    header = "draw,mu,lp__,y_rep.1," + ",".join(f"log_lik.{i + 1}" for i in range(N_OBS)) + "\n"
    (run / "c.csv").write_text(header + "".join(
        f"{d},{m[0]:.17g},-3.5,0.25," + ",".join(f"{v:.17g}" for v in row) + "\n"
        for d, m, row in zip(range(1, 51), mu, ll)))
    assert cli_main(["score", str(run), "--json", "--loglik", "log_lik", "--warmup", "10",
                     "--ignore", "y_rep*"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["draws"] == 40 and list(data["mixing"]["params"]) == ["mu"]
    expected = batch_scores(ll[10:][None], r_eff=None).to_dict()
    assert data["waic"]["elpd"] == pytest.approx(expected["waic"]["elpd"], rel=1e-9)
    # run.json overrides the flag
    write_json(run / "run.json", {"warmup": 20})
    chains, info, _ = read_run_folder(run, read_defaults=ReadOptions(loglik="log_lik", warmup=10))
    assert chains["c"][0].shape == (30, N_OBS)
    assert score_chains(chains, info).to_dict()["draws"] == 30
    # an unusable flag value is refused, naming the flag
    assert cli_main(["score", str(run), "--loglik", "log_lik", "--thin", "0"]) == 2
    assert "--thin" in capsys.readouterr().err
