"""The refit files: REFITS.json (chainvigil.refits) and the writer's refit helpers (chainvigil.writer)."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest

from _normal_model import exact_loo, loglik, posterior
from chainvigil.estimators.refit import exact_elpd, refit_request
from chainvigil.problems import InputProblem
from chainvigil.readers import load_npz_chunk, pending_chunks, read_run_info, scan_root
from chainvigil.refits import (REFITS_NAME, check_refit, read_refit_info, refit_jobs,
                               remove_refit_request, write_refit_request)
from chainvigil.writer import (ChainWriter, enough_signalled, pending_refits, read_refit_request,
                               write_refit_info, write_run_info)

SIGMA, MU0, TAU0 = 1.0, 0.0, 10.0


def _exact_request(run="hill", n=30, flagged=(4, 17)):
    k = np.full(n, 0.2)
    k[list(flagged)] = 0.9
    return refit_request(k, [f"plot {i + 1}" for i in range(n)], run=run, seed=3)


def _kfold_request(run="hill", n=30):
    k = np.full(n, 0.2)
    k[:5] = 0.9  # 5 of 30 > 10 %: K-fold
    return refit_request(k, None, run=run, seed=3, K=5)


def test_request_round_trip_and_removal(tmp_path):
    run = tmp_path / "hill"
    assert read_refit_request(run) is None
    req = _exact_request()
    path = write_refit_request(run, req)
    assert path == str(run / REFITS_NAME)
    assert not [p for p in os.listdir(run) if p.startswith(".")]   # no temporary file left behind
    assert read_refit_request(run) == req
    assert read_refit_request(run / REFITS_NAME) == req
    kf = _kfold_request()
    write_refit_request(run, kf)
    assert read_refit_request(run)["kfold"]["folds"] == kf["kfold"]["folds"]
    assert remove_refit_request(run) and read_refit_request(run) is None
    assert not remove_refit_request(run)


@pytest.mark.parametrize("mutate, words", [
    (lambda r: r["refits"][0].update(folder="../elsewhere"), "plain folder name"),
    (lambda r: r["refits"][0].update(folder=".hidden"), "plain folder name"),
    (lambda r: r["refits"][0].update(held_out=[4, 4]), "more than once"),
    (lambda r: r["refits"][0].update(held_out=[31]), "not observation numbers"),
    (lambda r: r["refits"][0].update(held_out=[4, 5]), "one observation"),
    (lambda r: r.update(method="both"), "'method'"),
    (lambda r: r.update(version=7), "version"),
    (lambda r: r.update(kfold={"K": 2}), "'kfold' must be null"),
    (lambda r: r["flagged"][0].update(k_hat="high"), "k_hat"),
])
def test_bad_requests_are_refused_naming_the_file(tmp_path, mutate, words):
    run = tmp_path / "hill"
    run.mkdir()
    req = _exact_request()
    mutate(req)
    (run / REFITS_NAME).write_text(json.dumps(req))
    with pytest.raises(ValueError) as err:
        read_refit_request(run)
    assert str(run / REFITS_NAME) in str(err.value) and words in str(err.value)
    with pytest.raises(ValueError, match=words.split("'")[0] or "."):
        write_refit_request(tmp_path / "other", req)   # the service's writer checks the same


def test_bad_kfold_requests_and_non_json(tmp_path):
    run = tmp_path / "hill"
    run.mkdir()
    req = _kfold_request()
    req["refits"][0]["held_out"] = req["refits"][1]["held_out"]
    (run / REFITS_NAME).write_text(json.dumps(req))
    with pytest.raises(ValueError, match="not fold"):
        read_refit_request(run)
    req = _kfold_request()
    del req["refits"][2]
    (run / REFITS_NAME).write_text(json.dumps(req))
    with pytest.raises(ValueError, match="every fold"):
        read_refit_request(run)
    (run / REFITS_NAME).write_text('{"version": 1, "run": "hill", "x": NaN')
    with pytest.raises(ValueError, match="not valid JSON"):
        read_refit_request(run)
    (run / REFITS_NAME).write_bytes(b"\x80\x04\x95")   # a pickle header is not JSON and is never unpickled
    with pytest.raises(ValueError, match="not valid JSON"):
        read_refit_request(run)


def test_write_refit_info_marks_a_refit_and_readers_still_read_it(tmp_path):
    d = tmp_path / "hill--fold-2"
    path = write_refit_info(d, "hill", np.array([3, 8, 12]), fold=np.int64(2), title="hill without fold 2",
                            observation_labels=["plot 3", "plot 8", "plot 12"], n_params=np.int64(2))
    raw = json.loads(open(path).read())
    assert raw["refit_of"] == "hill" and raw["held_out"] == [3, 8, 12] and raw["fold"] == 2
    assert read_refit_info(d) == {"refit_of": "hill", "held_out": [3, 8, 12], "fold": 2}
    # the ordinary reader keeps the ordinary fields (the refit fields are the service's to read)
    assert read_run_info(path) == {"title": "hill without fold 2", "n_params": 2,
                                   "observation_labels": ["plot 3", "plot 8", "plot 12"]}
    assert not [p for p in os.listdir(d) if p.startswith(".")]
    write_refit_info(tmp_path / "hill--refit-4", "hill", [4])
    assert read_refit_info(tmp_path / "hill--refit-4") == {"refit_of": "hill", "held_out": [4], "fold": None}
    write_run_info(tmp_path / "plain", title="not a refit")
    assert read_refit_info(tmp_path / "plain") is None
    assert read_refit_info(tmp_path / "nothing") is None


@pytest.mark.parametrize("args, kwargs, words", [
    (("a/b", [1]), {}, "plain folder name"),
    (("hill", []), {}, "non-empty list"),
    (("hill", [0]), {}, "not observation numbers"),
    (("hill", [2, 2]), {}, "more than once"),
    (("hill", [1.5]), {}, "not observation numbers"),
    (("hill", [1]), {"fold": 0}, "'fold'"),
    (("hill", [1]), {"dataset": "x"}, "dataset"),
    (("hill", [1]), {"colour": "x"}, "unknown"),
    (("hill", [1, 2]), {"observation_labels": ["one"]}, "labels"),
])
def test_write_refit_info_refuses_bad_fields(tmp_path, args, kwargs, words):
    with pytest.raises(ValueError, match=words):
        write_refit_info(tmp_path / "r", *args, **kwargs)
    assert not (tmp_path / "r" / "run.json").exists()


def test_bad_refit_run_json_is_an_input_problem(tmp_path):
    d = tmp_path / "r"
    d.mkdir()
    (d / "run.json").write_text('{"held_out": [1]}')
    with pytest.raises(InputProblem) as err:
        read_refit_info(d)
    assert err.value.kind == "bad_refit_info" and "without 'refit_of'" in err.value.problem
    (d / "run.json").write_text('{"refit_of": "hill", "held_out": "3"}')
    with pytest.raises(InputProblem, match="held_out"):
        read_refit_info(d)


def test_check_refit_names_each_kind_of_mismatch():
    req = _exact_request()
    ok = {"refit_of": "hill", "held_out": [5], "fold": None}
    assert check_refit(ok, req, loglik_columns=1, known_runs=["hill"]) is None
    assert "no run" in check_refit({**ok, "refit_of": "dale"}, req, known_runs=["hill"])
    assert "no refit request" in check_refit(ok, None)
    assert "not a refit" in check_refit({**ok, "held_out": [6]}, req)
    assert "not K-fold" in check_refit({**ok, "fold": 1}, req)
    assert "2 log-likelihood columns for 1" in check_refit(ok, req, loglik_columns=2)
    kf = _kfold_request()
    fold2 = kf["refits"][1]["held_out"]
    good = {"refit_of": "hill", "held_out": fold2, "fold": 2}
    assert check_refit(good, kf, loglik_columns=len(fold2)) is None
    assert "names no fold" in check_refit({**good, "fold": None}, kf)
    assert "no fold 9" in check_refit({**good, "fold": 9}, kf)
    assert "does not match fold 2" in check_refit({**good, "held_out": fold2[:-1]}, kf)
    assert "does not match fold 2" in check_refit({**good, "held_out": fold2[::-1]}, kf)


def test_pending_refits_lists_each_job_once_beside_the_run(tmp_path):
    run = tmp_path / "hill"
    write_refit_request(run, _exact_request())
    jobs = pending_refits(run)
    assert [(os.path.basename(j.folder), j.held_out, j.held_out0, j.fold) for j in jobs] == [
        ("hill--refit-5", (5,), [4], None), ("hill--refit-18", (18,), [17], None)]
    assert all(os.path.dirname(j.folder) == str(tmp_path) for j in jobs)
    write_refit_info(jobs[0].folder, "hill", jobs[0].held_out)
    assert [j.held_out for j in pending_refits(run)] == [(18,)]
    assert len(refit_jobs(run)) == 2
    assert pending_refits(tmp_path / "other") == []


def test_a_refit_loop_writes_runs_whose_exact_values_match_the_closed_form(tmp_path):
    # The loop the README shows, with the conjugate normal model (tests/_normal_model.py, BDA3 ch. 2)
    # as the "sampler": it reads REFITS.json, fits without the held-out readings, writes the refit
    # runs; the readers read them back and exact_elpd matches the closed-form exact LOO (4 MCSE).
    rng = np.random.default_rng(5)
    y = rng.normal(0.0, SIGMA, 30)
    y[[4, 17]] += [9.0, -8.0]
    run = tmp_path / "hill"
    write_refit_request(run, _exact_request())
    for job in pending_refits(run):
        keep = np.setdiff1d(np.arange(y.size), job.held_out0)
        write_refit_info(job.folder, job.refit_of, job.held_out, fold=job.fold, n_params=1)
        m, t = posterior(y[keep], SIGMA, MU0, TAU0)
        for c in range(2):
            with ChainWriter(job.folder, f"chain-{c + 1}", param_names=("mu",)) as out:
                for _block in range(10):
                    if enough_signalled(job.folder):
                        break
                    mu = rng.normal(m, t, size=2000)
                    out.append(loglik(y[job.held_out0], mu[None, :], SIGMA)[0], mu[:, None])
    scan = scan_root(tmp_path)
    truth = exact_loo(y, SIGMA, MU0, TAU0)
    for name, i in [("hill--refit-5", 4), ("hill--refit-18", 17)]:
        folder = scan[name]
        info = read_refit_info(folder.path)
        chains = []
        for chain, chunk_dir in sorted(folder.npz_chains.items()):
            parts = [load_npz_chunk(os.path.join(chunk_dir, p)).loglik for p in pending_chunks(chunk_dir, set())]
            chains.append(np.concatenate(parts))
        ll = np.stack(chains)
        assert ll.shape == (2, 20_000, 1)
        assert check_refit(info, _exact_request(), loglik_columns=ll.shape[2], known_runs=["hill"]) is None
        e, s = exact_elpd(ll)
        assert abs(e[0] - truth[i]) < 4 * s[0]


def test_groups_for_kfold_are_read_from_run_json(tmp_path):
    from chainvigil.refits import read_groups

    d = tmp_path / "r"
    assert read_groups(d, 4) is None
    d.mkdir()
    (d / "run.json").write_text(json.dumps({"title": "t", "group": ["a", "a", 3, 3]}))
    assert read_groups(d, 4) == ["a", "a", 3, 3]
    with pytest.raises(InputProblem, match="each of the 5"):
        read_groups(d, 5)
    (d / "run.json").write_text(json.dumps({"group": ["a", None, "b", "b"]}))
    with pytest.raises(InputProblem, match="'group'"):
        read_groups(d, 4)
    (d / "run.json").write_text(json.dumps({"title": "t"}))
    assert read_groups(d, 4) is None


def test_a_fifo_in_place_of_the_files_is_refused_without_blocking(tmp_path):
    import os

    from chainvigil.refits import read_refit_info
    run = tmp_path / "run"
    run.mkdir()
    os.mkfifo(run / "REFITS.json")
    os.mkfifo(run / "run.json")
    with pytest.raises(ValueError, match="REFITS.json: the file is a named pipe"):
        read_refit_request(run)  # the sampler-side reader: a ValueError naming the file
    with pytest.raises(InputProblem) as info:
        read_refit_info(run)  # the service side: an input problem (an event)
    assert info.value.kind == "not_regular" and "run.json" in str(info.value)
