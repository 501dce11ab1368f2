"""The service end to end on real run folders: real files, real zarr store, real SQLite history.

Most tests drive `Service.cycle()` directly (synchronous, deterministic); the watcher-driven loop and
the command line are covered in tests/test_service_process.py.
"""
from __future__ import annotations

import json
import os
import zipfile
from pathlib import Path

import numpy as np
import pytest

from chainvigil.estimators import batch_scores
from chainvigil.oneshot import read_run_folder, score_chains
from chainvigil.service import Service
from chainvigil.writer import ChainWriter, write_run_info
from chainvigil.storage.history import History

N_OBS = 12


def normal_loglik(rng, draws, n=N_OBS, shift=0.0):
    """Pointwise log-likelihoods of a normal model y_i ~ N(mu, 1) at posterior draws of mu."""
    y = np.linspace(-1.5, 1.5, n)
    mu = rng.normal(0.0 + shift, 0.3, size=(draws, 1))
    ll = -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, :] - mu) ** 2
    return ll, mu


def write_chain(run_dir, chain, rng, draws, fmt="npz", blocks=1, n=N_OBS):
    with ChainWriter(run_dir, chain, param_names=("mu",), fmt=fmt) as writer:
        for _ in range(blocks):
            ll, mu = normal_loglik(rng, draws, n)
            writer.append(ll, mu)


def events_of(service, kind=None):
    return [e for e in service.history.events() if kind is None or e["kind"] == kind]



def make_service(root, **kw):
    kw.setdefault("every", 0.0)
    return Service(root, **kw)


def test_ingest_scores_and_matches_one_shot_score(root):
    rng = np.random.default_rng(1)
    run = root / "lake-a"
    write_run_info(run, title="lake a", dataset="lakes", n_params=1,
                   observation_labels=[f"day {i + 1}" for i in range(N_OBS)])
    for c in range(3):
        write_chain(run, f"c{c}", rng, 150, fmt="npz" if c else "csv", blocks=2)
    service = make_service(root)
    service.cycle(force=True)
    snap = service.history.latest_snapshot("lake-a")
    assert snap["draws"] == 900 and snap["draws_per_chain"] == 300 and snap["chains"] == 3
    # the store holds every draw once, in file order
    chains, info, problems = read_run_folder(run)
    assert problems == []
    for name, (ll, params, _) in chains.items():
        np.testing.assert_array_equal(service.store.read_loglik("lake-a", name), ll)
    # the streaming snapshot equals the batch score of the same draws with the same r_eff (docs/numerics.md,
    # streaming invariant); the service's r_eff is the streaming estimate, recorded as such
    assert snap["r_eff_source"] == "streaming"
    r_eff = service.runs["lake-a"].scorer.r_eff()
    names = sorted(chains)
    stacked = np.stack([chains[c][0] for c in names])
    batch = batch_scores(stacked, r_eff=r_eff).to_dict()
    for key in ("elpd", "se", "p_eff"):
        assert snap[f"loo_{key}"] == pytest.approx(batch["loo"][key], rel=1e-9)
    # the joint MCSE comes from the store pass, which runs off the loop: once it has covered these
    # draws, a snapshot of them carries the batch score's joint MCSE exactly
    assert service.passes.worker.wait(60)
    service.take_snapshot(service.runs["lake-a"])  # the first pass started with the first snapshot;
    assert service.passes.worker.wait(60)                 # this one takes it in
    again = service.take_snapshot(service.runs["lake-a"])
    assert again["loo"]["mcse"] == pytest.approx(batch["loo"]["mcse"], rel=1e-9)
    assert service.history.latest_snapshot("lake-a")["joint_pass"] == 300
    assert snap["k_max"] == pytest.approx(batch["pareto_k"]["max"], rel=1e-9)
    batch = score_chains(chains, info, run="lake-a").to_dict()  # the one-shot: full r_eff, close
    assert snap["loo_elpd"] == pytest.approx(batch["loo"]["elpd"], abs=0.05)
    assert snap["waic_elpd"] == pytest.approx(batch["waic"]["elpd"], rel=1e-9)
    assert snap["rhat_max"] == pytest.approx(batch["mixing"]["rhat_max"], rel=1e-9)
    pointwise = service.history.pointwise("lake-a")
    assert [p["label"] for p in pointwise] == [f"day {i + 1}" for i in range(N_OBS)]
    service.close()


def test_restart_resumes_without_duplicates(root):
    rng = np.random.default_rng(2)
    run = root / "r"
    write_chain(run, "a", rng, 100, fmt="csv")
    write_chain(run, "b", rng, 100, fmt="npz")
    service = make_service(root)
    service.cycle(force=True)
    service.close()
    # more draws arrive while the service is down
    write_chain(run, "a", rng, 50, fmt="csv")
    write_chain(run, "b", rng, 50, fmt="npz")
    again = make_service(root)
    again.cycle(force=True)
    assert again.store.length("r", "a") == 150 and again.store.length("r", "b") == 150
    ids = again.store.read_draw_ids("r", "a")
    np.testing.assert_array_equal(ids, np.arange(1, 151))
    assert again.history.latest_snapshot("r")["draws"] == 300
    again.close()


def test_second_service_on_same_state_is_refused(root):
    from chainvigil.service import ServiceError

    first = make_service(root)
    with pytest.raises(ServiceError, match="another chainvigil service"):
        make_service(root)
    first.close()


def test_two_runs_on_same_data_are_compared(root):
    rng = np.random.default_rng(3)
    for name, shift in (("near", 0.0), ("far", 1.5)):
        run = root / name
        write_run_info(run, title=name, dataset="shared-data", n_params=1)
        with ChainWriter(run, "c1", param_names=("mu",)) as w:
            ll, mu = normal_loglik(rng, 400, shift=shift)
            w.append(ll, mu)
    other = root / "other-data"
    write_run_info(other, title="other", dataset="different", n_params=1)
    write_chain(other, "c1", rng, 400)
    service = make_service(root)
    service.cycle(force=True)
    rows = service.history.comparisons(dataset="shared-data")
    assert [r["run"] for r in rows] == ["near", "far"]
    assert rows[0]["delta"] == 0 and rows[1]["delta"] < 0
    assert service.history.comparisons(dataset="different") == []
    service.close()


def test_every_pair_and_the_mixing_figures_are_stored(root):
    rng = np.random.default_rng(4)
    for name, shift in (("near", 0.0), ("mid", 0.6), ("far", 1.5)):
        run = root / name
        write_run_info(run, title=name, dataset="shared-data", n_params=1)
        for chain in ("c1", "c2"):
            with ChainWriter(run, chain, param_names=("mu",)) as w:
                ll, mu = normal_loglik(rng, 300, shift=shift)
                w.append(ll, mu)
    service = make_service(root)
    service.cycle(force=True)
    h = service.history
    rows = h.comparisons(dataset="shared-data")
    pairs = h.comparison_pairs(rows[0]["round"])
    assert len(pairs) == 3 and {(p["run_a"], p["run_b"]) for p in pairs} == {
        (a["run"], b["run"]) for i, a in enumerate(rows) for b in rows[i + 1:]}
    # the stored pairs agree with the stored per-run rows and the pointwise values (numpy)
    elpd = {r["run"]: r["elpd"] for r in rows}
    pointwise = {r: np.array([p["elpd_loo"] for p in h.pointwise(r)]) for r in elpd}
    for p in pairs:
        d = pointwise[p["run_a"]] - pointwise[p["run_b"]]
        assert p["delta"] == pytest.approx(elpd[p["run_a"]] - elpd[p["run_b"]], abs=1e-9)
        assert p["se_delta"] == pytest.approx(np.sqrt(d.size * d.var(ddof=1)), rel=1e-9)
    # mixing rows carry the spread, the interval, per-chain figures and the projection
    for name in elpd:
        snap = h.latest_snapshot(name)
        (mu,) = h.mixing(snap["id"])
        draws = np.stack([service.store.read_params(name, c)[:, 0] for c in ("c1", "c2")])
        assert mu["sd"] == pytest.approx(np.std(draws, ddof=1), rel=1e-9)
        assert mu["q05"] == pytest.approx(np.quantile(draws, 0.05), rel=1e-9)
        assert mu["chain_means"] == pytest.approx(draws.mean(axis=1).tolist(), rel=1e-9)
        goal = 100 * 2
        expected = 0 if min(mu["ess_bulk"], mu["ess_tail"]) >= goal else \
            int(np.ceil(300 * goal / min(mu["ess_bulk"], mu["ess_tail"]) - 1e-9)) - 300
        assert mu["more_draws"] == expected
    service.close()


def test_headless_output_says_when_the_comparison_order_changes(root):
    rng = np.random.default_rng(3)
    writers = {}
    for name in ("one", "two"):
        write_run_info(root / name, title=name, dataset="shared-data", n_params=1)
        writers[name] = ChainWriter(root / name, "c1", param_names=("mu",))
    ll, mu = normal_loglik(rng, 400, shift=0.0)
    writers["one"].append(ll, mu)
    ll, mu = normal_loglik(rng, 400, shift=2.0)
    writers["two"].append(ll, mu)
    lines = []
    service = make_service(root, report=lines.append)
    service.cycle(force=True)
    first = [line for line in lines if "compare 'shared-data'" in line]
    assert len(first) == 1 and "order one > two" in first[0]
    lines.clear()
    service.cycle(force=True)  # nothing new: no comparison line
    assert not [line for line in lines if "compare" in line]
    # 'two' gets many draws at the right place: its elpd overtakes 'one'
    for _ in range(4):
        ll, mu = normal_loglik(rng, 400, shift=0.0)
        writers["two"].append(ll[:, :], mu)
    writers["one"].append(*normal_loglik(rng, 1600, shift=3.0))
    service.cycle(force=True)
    changed = [line for line in lines if "compare 'shared-data'" in line]
    assert changed and "order now two > one (was one > two)" in changed[0]
    for w in writers.values():
        w.close()
    service.close()


def test_enough_writes_signal_and_runs_command(root, tmp_path):
    rng = np.random.default_rng(4)
    run = root / "easy"
    write_run_info(run, title="easy", dataset="d", n_params=1)
    for c in range(4):
        write_chain(run, f"c{c}", rng, 800)
    marker = tmp_path / "on-enough.txt"
    # The command is the user's own line, split once, no shell of ours; values arrive in the environment.
    service = make_service(root, on_enough=f"sh -c 'printf %s \"$CHAINVIGIL_RUN\" > {marker}'")
    service.cycle(force=True)
    assert not (run / "ENOUGH.json").exists()  # the settled check needs a trail spanning a fifth
    # iid draws: every mixing and MCSE target is met at once; 200 more per chain span the window
    for c in range(4):
        write_chain(run, f"c{c}", rng, 200)
    service.cycle(force=True)
    signal = run / "ENOUGH.json"
    assert signal.is_file(), service.history.latest_snapshot("easy")["verdict"]
    body = json.loads(signal.read_text())
    assert body["draws"] == 4000
    assert any(e["kind"] == "enough" for e in events_of(service))
    assert service.history.run("easy")["state"] == "enough"
    service.close()
    for _ in range(50):
        if marker.exists() and marker.read_text().strip():
            break
        import time
        time.sleep(0.1)
    assert marker.read_text().strip() == "easy"


# ---------------------------------------------------------------------- bad input, one test each
def _assert_event(service, kind, path_part):
    found = [e for e in events_of(service) if e["kind"] == kind]
    assert found, f"no {kind} event; events: {events_of(service)}"
    assert any(path_part in (e["file"] or "") and path_part in e["message"] for e in found), found


def test_truncated_npz_is_an_event_its_chain_waits_and_the_rest_goes_on(root):
    rng = np.random.default_rng(5)
    run = root / "r"
    write_chain(run, "c", rng, 50, blocks=2)
    write_chain(run, "d", rng, 30)
    chunk = sorted((run / "c").glob("*.npz"))[0]
    data = chunk.read_bytes()
    chunk.write_bytes(data[: len(data) // 2])
    service = make_service(root)
    service.cycle(force=True)
    _assert_event(service, "truncated_npz", chunk.name)
    assert service.store.length("r", "c") == 0  # not taken, and the chunk after it waits (order)
    assert service.store.length("r", "d") == 30  # other chains go on
    chunk.write_bytes(data)  # the writer finishes the chunk
    service.cycle(force=True)
    assert service.store.length("r", "c") == 100
    service.close()


def test_non_zip_npz_is_an_event(root):
    rng = np.random.default_rng(6)
    run = root / "r"
    write_chain(run, "c", rng, 20)
    bogus = run / "c" / "99999999.npz"
    bogus.write_text("this is not a zip archive")
    service = make_service(root)
    service.cycle(force=True)
    _assert_event(service, "not_npz", "99999999.npz")
    assert service.store.length("r", "c") == 20
    service.close()


def test_pickled_npz_is_refused_unloaded(root, tmp_path):
    rng = np.random.default_rng(7)
    run = root / "r"
    write_chain(run, "c", rng, 20)
    evil = run / "c" / "99999999.npz"
    np.savez(evil, loglik=np.array([{"x": 1}], dtype=object))
    service = make_service(root)
    service.cycle(force=True)
    _assert_event(service, "pickled_npz", "99999999.npz")
    assert service.store.length("r", "c") == 20
    service.close()


def test_csv_rewritten_with_another_header_becomes_a_new_segment(root):
    rng = np.random.default_rng(8)
    run = root / "r"
    write_chain(run, "a", rng, 30, fmt="csv")
    write_chain(run, "b", rng, 30, fmt="npz")
    service = make_service(root)
    service.cycle(force=True)
    path = run / "a.csv"
    text = path.read_text().splitlines(keepends=True)
    text[0] = text[0].replace("mu", "sigma")
    path.write_text("".join(text) + text[-1])
    write_chain(run, "b", rng, 10, fmt="npz")
    service.cycle(force=True)
    _assert_event(service, "rewritten", "a.csv")
    assert service.store.length("r", "a") == 30  # the draws taken before stay
    # the rewritten file is read from its start as a~2, but its draws equal those taken into 'a'
    # (only the header changed) and its last line repeats draw 30: nothing is counted twice
    assert service.store.length("r", "a~2") == 0
    assert service.store.length("r", "b") == 40
    service.close()


def test_bad_rows_are_skipped_with_events_good_rows_kept(root):
    rng = np.random.default_rng(9)
    run = root / "r"
    write_chain(run, "a", rng, 10, fmt="csv")
    path = run / "a.csv"
    good_line = path.read_text().splitlines()[-1]
    with open(path, "a") as f:
        f.write("11,0.5,1.0\n")  # wrong number of fields
        f.write("12," + ",".join(["oops"] * (N_OBS + 1)) + "\n")  # non-numeric
        f.write(good_line.replace(good_line.split(",")[0], "13", 1) + "\n")
    service = make_service(root)
    service.cycle(force=True)
    kinds = {e["kind"] for e in events_of(service)}
    assert "bad_row" in kinds and "non_numeric" in kinds, kinds
    assert service.store.length("r", "a") == 11
    service.close()


def test_nan_and_inf_loglik_are_kept_and_flagged(root):
    rng = np.random.default_rng(10)
    run = root / "r"
    ll, mu = normal_loglik(rng, 100)
    ll[5, 3] = np.nan
    ll[7, 4] = np.inf
    with ChainWriter(run, "c", param_names=("mu",)) as w:
        w.append(ll, mu)
    service = make_service(root)
    service.cycle(force=True)
    _assert_event(service, "bad_values", "c")
    assert service.store.length("r", "c") == 100
    stored = service.store.read_loglik("r", "c")
    assert np.isnan(stored[5, 3]) and np.isposinf(stored[7, 4])
    pointwise = {p["obs"]: p for p in service.history.pointwise("r")}
    assert pointwise[3]["k_hat"] is None or not np.isfinite(pointwise[3]["k_hat"])
    service.close()


def test_chain_with_other_n_is_refused_and_kept_in_its_file(root):
    rng = np.random.default_rng(11)
    run = root / "r"
    write_chain(run, "a", rng, 40)
    write_chain(run, "b", rng, 40, n=N_OBS + 3)
    service = make_service(root)
    service.cycle(force=True)
    _assert_event(service, "n_mismatch", "b")
    assert service.store.length("r", "a") == 40
    assert "b" not in service.store.chains("r")
    assert len(list((run / "b").glob("*.npz"))) == 1  # nothing of the sampler's output is touched
    service.close()


def test_run_folder_that_vanishes_and_returns(root):
    rng = np.random.default_rng(12)
    run = root / "r"
    write_chain(run, "a", rng, 20, fmt="csv")
    service = make_service(root)
    service.cycle(force=True)
    hidden = root.parent / "parked"
    run.rename(hidden)
    service.cycle(force=True)
    _assert_event(service, "run_vanished", "r")
    hidden.rename(run)
    write_chain(run, "a", rng, 5, fmt="csv")
    service.cycle(force=True)
    assert service.store.length("r", "a") == 25
    assert service.history.latest_snapshot("r")["draws"] == 25
    service.close()


def test_symlink_outside_root_is_not_followed(root, tmp_path):
    rng = np.random.default_rng(13)
    outside = tmp_path / "elsewhere"
    write_chain(outside, "x", rng, 10, fmt="csv")
    (root / "sneaky").symlink_to(outside)
    write_chain(root / "fine", "a", rng, 10)
    service = make_service(root)
    service.cycle(force=True)
    _assert_event(service, "outside_root", "sneaky")
    assert "sneaky" not in service.store.runs()
    assert service.store.length("fine", "a") == 10
    service.close()


def test_files_that_are_not_ours(root):
    rng = np.random.default_rng(14)
    run = root / "r"
    write_chain(run, "a", rng, 10)
    (run / "notes.txt").write_text("remember to feed the cat\n")
    (run / "budget.csv").write_text("item,cost\ntea,3\n")
    service = make_service(root)
    service.cycle(force=True)
    kinds = {(e["kind"], Path(e["file"] or "").name) for e in events_of(service)}
    assert ("not_ours", "notes.txt") in kinds
    assert any(name == "budget.csv" for _, name in kinds), kinds
    assert service.store.length("r", "a") == 10
    service.close()


def test_bad_run_json_is_an_event_and_draws_still_scored(root):
    rng = np.random.default_rng(15)
    run = root / "r"
    write_chain(run, "a", rng, 60)
    (run / "run.json").write_text('{"title": "half written", "n_params": ')
    service = make_service(root)
    service.cycle(force=True)
    _assert_event(service, "bad_run_info", "run.json")
    assert service.history.latest_snapshot("r")["draws"] == 60
    service.close()


def test_state_folder_elsewhere_writes_nothing_in_root(root, tmp_path):
    rng = np.random.default_rng(16)
    write_chain(root / "r", "a", rng, 30)
    before = sorted(str(p) for p in root.rglob("*"))
    state = tmp_path / "state"
    service = make_service(root, state_dir=state, signal_enough=False)
    service.cycle(force=True)
    service.close()
    assert sorted(str(p) for p in root.rglob("*")) == before
    assert (state / "history.sqlite").is_file()


def test_run_json_arriving_late_sets_labels_and_reference_scores(root):
    rng = np.random.default_rng(17)
    run = root / "late"
    write_chain(run, "a", rng, 200)
    service = make_service(root)
    service.cycle(force=True)
    first = service.history.latest_snapshot("late")
    write_run_info(run, title="late", dataset="d", n_params=1, point_loglik=-10.0,
                   observation_labels=[f"site {i}" for i in range(N_OBS)])
    write_chain(run, "a", rng, 10)
    service.cycle(force=True)
    second = service.history.latest_snapshot("late")
    # AIC with a supplied maximum: point_loglik − n_params (Akaike 1974)
    assert second["aic_elpd"] == pytest.approx(-11.0)
    assert first["aic_elpd"] != second["aic_elpd"]
    assert service.history.pointwise("late")[0]["label"] == "site 0"
    service.close()


def test_the_compare_check_uses_this_passes_comparison(root):
    """Comparisons are made from the pass's own scores before its verdicts: already the first pass's
    verdicts carry the compare check, with the Δ of the round written in that same pass."""
    rng = np.random.default_rng(5)
    for name, shift in (("near", 0.0), ("far", 1.5)):  # (the first pass: no earlier round exists)
        run = root / name
        write_run_info(run, title=name, dataset="shared-data", n_params=1)
        with ChainWriter(run, "c1", param_names=("mu",)) as w:
            ll, mu = normal_loglik(rng, 400, shift=shift)
            w.append(ll, mu)
    service = make_service(root)
    service.cycle(force=True)
    rounds = {r["round"] for r in service.history.comparisons(dataset="shared-data")}
    assert len(rounds) == 1  # one pass, one round
    far = service.history.latest_snapshot("far")
    assert far["seq"] == 1
    checks = {c["name"]: c for c in far["verdict"]["checks"]}
    assert "compare" in checks, sorted(checks)
    row = next(r for r in service.history.comparisons(dataset="shared-data") if r["run"] == "far")
    assert row["delta"] < 0
    # Control: a run with no partner gets no compare check (the check comes from the comparison).
    write_run_info(root / "alone", title="alone", dataset="its-own", n_params=1)
    write_chain(root / "alone", "c1", rng, 400)
    service.cycle(force=True)
    alone = service.history.latest_snapshot("alone")
    assert "compare" not in {c["name"] for c in alone["verdict"]["checks"]}
    service.close()
