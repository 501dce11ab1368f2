"""``--keep-draws all|tail|none`` through the real service: scores equal to keeping every draw while a
run stays within its plan, a draw store whose size stays bounded as draws grow, restarts that lose
nothing, the flag when the PSIS tail buffer turns out too small, and ``prune`` on a retained run.

Real parts only: real zarr stores and SQLite files in tmp_path, the real ``Service`` driven through
``cycle()``, the real ``ChainWriter``; a SIGKILL of a real ``chainvigil watch`` process (slow)."""

from __future__ import annotations

import json
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from _ar1_model import ar1_normal_loglik
from chainvigil.estimators.psis import tail_length
from chainvigil.longrun import (KEEP_WINDOW, checkpoint_path, fit_r_eff_to_buffer, planned_buffer_size)
from chainvigil.readers import check_run_info
from chainvigil.service import Service
from chainvigil.storage.history import History
from chainvigil.writer import ChainWriter

N = 30
CHAINS = ("a", "b", "c")
PROJECT = Path(__file__).resolve().parents[1]


def loglik(rng, draws, n=N):
    """y_i ~ N(mu, 1) at AR(1) draws of mu (autocorrelated, so r_eff < 1)."""
    return ar1_normal_loglik(rng, draws, n)


def grow(run_dir, rng, draws):
    for c in CHAINS:
        with ChainWriter(run_dir, c, param_names=("mu",)) as w:
            w.append(*loglik(rng, draws))


def describe(run_dir, **info):
    run_dir.mkdir(parents=True, exist_ok=True)
    (run_dir / "run.json").write_text(json.dumps(info))


def loglik_bytes(state_dir, run) -> int:
    """Bytes of every stored log-likelihood chunk file of a run (all chains; zarr writes an edge chunk
    at full size)."""
    return sum(p.stat().st_size for c in CHAINS
               for p in (state_dir / "draws.zarr" / run / c / "loglik" / "c").rglob("*") if p.is_file())


def scores_of(svc, run):
    st = svc.runs[run]
    return st.scorer.scores(st.scorer.r_eff()).to_dict()


def assert_same_scores(a, b, rel=1e-9):
    for part, keys in (("loo", ("elpd", "se", "p_eff", "mcse_independent")), ("waic", ("elpd", "se", "p_eff")),
                       ("dic", ("elpd", "p_eff"))):
        for key in keys:
            assert a[part][key] == pytest.approx(b[part][key], rel=rel, abs=1e-12), (part, key)
    np.testing.assert_allclose(a["pareto_k"]["values"], b["pareto_k"]["values"], rtol=rel, atol=1e-12)
    np.testing.assert_allclose(a["pointwise"]["loo"], b["pointwise"]["loo"], rtol=rel, atol=1e-12)



def test_planned_buffer_follows_the_psis_tail_length():
    # M = ceil(min(S/5, 3 sqrt(S/r))) (Vehtari et al. 2024, sec. 3): S = 40,000 at r = 0.1 ->
    # 3 sqrt(400,000) = 1897.4 -> M = 1898, K = M + 1
    assert planned_buffer_size(40_000, 0.1) == 1899
    assert planned_buffer_size(100, 1.0) == 21  # S/5 = 20 < 3 sqrt(100) = 30
    # a buffer too small: r raised to the smallest value with M + 1 <= K, only where it is needed
    r = np.array([1.0, 0.5, 0.01])
    used, short, need = fit_r_eff_to_buffer(10_000, 700, r)  # r = 1: M = 300, r = 0.5: M = 425
    assert need == int(tail_length(10_000, 0.01)[0]) + 1 == 2001  # S/5 = 2000 < 3 sqrt(1e6)
    assert short.tolist() == [False, False, True] and used[0] == 1.0 and used[1] == 0.5
    assert int(tail_length(10_000, used[2])[0]) + 1 <= 700 < int(tail_length(10_000, used[2] * 0.999)[0]) + 1
    same, none_short, _ = fit_r_eff_to_buffer(10_000, 5000, r)
    assert not none_short.any() and np.array_equal(same, r)


def test_run_json_draws_expected_is_checked():
    assert check_run_info({"draws_expected": 40_000})["draws_expected"] == 40_000
    bad = check_run_info({"draws_expected": -3, "title": "t"})
    assert "draws_expected" not in bad and bad["title"] == "t"
    assert "'draws_expected' must be a whole number" in bad.problems[0].problem


def test_tail_and_none_score_as_all_within_plan_and_keep_the_store_bounded(root, tmp_path):
    rng = np.random.default_rng(11)
    run = root / "r"
    describe(run, draws_expected=3 * 3000)
    services = {mode: Service(root, tmp_path / f"state-{mode}", every=0.0, checkpoint_every=0, keep_draws=mode)
                for mode in ("all", "tail", "none")}
    sizes = {mode: [] for mode in services}
    try:
        for step in range(6):
            grow(run, rng, 300)
            for mode, svc in services.items():
                svc.cycle(force=True)
                sizes[mode].append(loglik_bytes(svc.state_dir, "r"))
            ref = scores_of(services["all"], "r")
            for mode in ("tail", "none"):
                assert_same_scores(scores_of(services[mode], "r"), ref)
                row, ref_row = (services[m].history.latest_snapshot("r") for m in (mode, "all"))
                assert row["draws_per_chain"] == ref_row["draws_per_chain"] == 300 * (step + 1)
                for key in ("loo_elpd", "loo_se", "waic_elpd", "k_max", "r_eff_mean"):
                    assert row[key] == pytest.approx(ref_row[key], rel=1e-9), (mode, key)
        # all keeps every chain's 1800 draws; tail keeps the window behind the checkpoint (rounded down
        # to a chunk of 256 draws) and the partial last chunk (stored at full size); none keeps the
        # partial last chunk
        row_bytes = N * 8
        assert sizes["all"][-1] >= 3 * 1800 * row_bytes
        assert sizes["tail"][-1] <= 3 * (KEEP_WINDOW + 512) * row_bytes
        assert sizes["none"][-1] <= 3 * 256 * row_bytes
        # bounded: the store does not grow from the 4th step (1200 draws per chain) to the 6th, while
        # keeping all grows by half
        assert sizes["all"][-1] >= 1.45 * sizes["all"][3]
        assert max(sizes["tail"][3:]) <= 3 * (KEEP_WINDOW + 512) * row_bytes
        assert max(sizes["none"][3:]) <= 3 * 256 * row_bytes
        tail = services["tail"]
        assert tail.store.kept_from("r", "a") >= 1800 - KEEP_WINDOW - 256
        # parameter draws and draw numbers are all kept (mixing reads them)
        assert tail.store.read_params("r", "a").shape == (1800, 1)
        np.testing.assert_array_equal(tail.store.read_draw_ids("r", "b"), np.arange(1, 1801))
        assert tail.history.latest_snapshot("r")["rhat_max"] == pytest.approx(
            services["all"].history.latest_snapshot("r")["rhat_max"], rel=1e-12)
        # what is approximate is said: tail's joint MCSE comes from the kept window, none has none
        for svc in services.values():
            assert svc.passes.worker.wait(30)
        grow(run, rng, 300)
        for svc in services.values():
            svc.cycle(force=True)
        assert services["all"].history.latest_snapshot("r")["retention_note"] is None
        tail_row = tail.history.latest_snapshot("r")
        assert "kept window" in tail_row["retention_note"] and tail_row["joint_pass"] < 2100
        assert tail_row["verdict"]["retention_note"] == tail_row["retention_note"]
        none_row = services["none"].history.latest_snapshot("r")
        assert "joint MCSE" in none_row["retention_note"] and "dropped" in none_row["retention_note"]
    finally:
        for svc in services.values():
            svc.finish()


@pytest.mark.slow
def test_a_slow_joint_pass_holds_back_only_the_draws_it_reads(root):
    """tail: the pass reads the last 512 draws per chain; drops below its view go on while it runs."""
    rng = np.random.default_rng(18)
    run = root / "r"
    describe(run, draws_expected=3 * 6000)
    svc = Service(root, every=0.0, checkpoint_every=0, keep_draws="tail")
    try:
        for _ in range(5):
            grow(run, rng, 300)
            svc.cycle(force=True)
        assert svc.passes.worker.wait(30)
        svc.passes.worker.delay = 3.0  # passes from now on take 3 s (the worker's test knob)
        grow(run, rng, 600)
        svc.cycle(force=True)  # 2100 draws per chain: a pass over draws 1588..2100 starts
        assert svc.passes.worker.busy("r") and svc.passes.first["r"]["a"] == 2100 - KEEP_WINDOW
        for _ in range(3):
            grow(run, rng, 300)
            svc.cycle(force=True)
        assert svc.passes.worker.busy("r")
        # the checkpoint covers 3000 draws: dropped below the pass's view (1588 -> chunk 1536), not
        # below 3000 - 512 yet
        assert svc.store.kept_from("r", "a") == 1536
        assert svc.passes.worker.wait(30)
        svc.cycle(force=True)
        assert svc.store.kept_from("r", "a") == (3000 - KEEP_WINDOW) // 256 * 256
    finally:
        svc.finish()


# The restart reads the checkpoint and the draws committed after it alike for both modes; the fast run
# takes tail (which also keeps a window), the full suite both.
@pytest.mark.parametrize("mode", ["tail", pytest.param("none", marks=pytest.mark.slow)])
def test_abandoned_service_restarts_without_losing_a_draw(root, tmp_path, mode):
    """A service dropped without its clean stop (no final pass, no last checkpoint, the store's
    unflushed chunk lost) restarts from its checkpoint plus the draws committed after it, and scores
    as a service that ran without interruption."""
    rng = np.random.default_rng(12)
    root_m = tmp_path / f"root-{mode}"
    run = root_m / "r"
    describe(run, draws_expected=3 * 4000)
    state = tmp_path / f"state-{mode}"
    svc = Service(root_m, state, every=0.0, checkpoint_every=0, keep_draws=mode)
    for _ in range(4):
        grow(run, rng, 250)
        svc.cycle(force=True)
    assert svc.store.kept_from("r", "a") > 0
    svc.scorers.checkpoint_every = 1e9  # the next commit is not checkpointed
    grow(run, rng, 250)
    svc.cycle()
    committed = svc.history.committed("r", "a")["draws"]
    assert committed == 1250
    svc.close()  # abandoned: lock released, nothing else
    svc = Service(root_m, state, every=0.0, checkpoint_every=0, keep_draws=mode)
    assert svc.runs["r"].scorer.draws == 3 * committed
    svc.cycle(force=True)
    reference = Service(root_m, tmp_path / f"uninterrupted-{mode}", every=0.0, keep_draws="all")
    reference.cycle(force=True)
    assert reference.runs["r"].scorer.draws == svc.runs["r"].scorer.draws == 3 * 1250
    assert_same_scores(scores_of(svc, "r"), scores_of(reference, "r"))
    for c in CHAINS:  # every draw once, in order
        np.testing.assert_array_equal(svc.store.read_draw_ids("r", c), np.arange(1, 1251))
    reference.finish()
    svc.finish()


def test_a_buffer_too_small_is_flagged_never_silent_never_a_crash(root):
    rng = np.random.default_rng(13)
    run = root / "r"
    describe(run, draws_expected=100)  # planned for 100 draws at r_eff >= 1: K = 21
    svc = Service(root, every=0.0, checkpoint_every=0, keep_draws="tail", reff_floor=1.0)
    try:
        grow(run, rng, 5)  # 15 draws: within plan, exact
        svc.cycle(force=True)
        assert svc.runs["r"].scorer.k == 21
        assert svc.history.latest_snapshot("r")["retention_note"] is None
        for _ in range(3):
            grow(run, rng, 300)
            svc.cycle(force=True)
        row = svc.history.latest_snapshot("r")
        assert row["draws_per_chain"] == 905 and np.isfinite(row["loo_elpd"]) and np.isfinite(row["k_max"])
        assert "PSIS tail buffer too small: K = 21" in row["retention_note"]
        assert row["verdict"]["retention_note"] == row["retention_note"]
        events = [e for e in svc.history.events(run="r") if e["kind"] == "tail_buffer_short"]
        assert len(events) == 1 and events[0]["level"] == "warning"
        S = 3 * 905
        r = svc.runs["r"].scorer.r_eff()
        need = int(tail_length(S, r).max()) + 1
        assert f"run 'r'" in events[0]["message"] and f"K = 21 values per observation, M + 1 = " in \
            events[0]["message"]
        assert need > 21
        assert svc.runs["r"].aside_reason is None and svc.runs["r"].scorer.rebuilds == 0
    finally:
        svc.finish()


def test_prune_still_frees_a_retained_run(root, capsys):
    from chainvigil.cli import main

    rng = np.random.default_rng(14)
    run = root / "r"
    describe(run, draws_expected=3 * 2000)
    svc = Service(root, every=0.0, checkpoint_every=0, keep_draws="tail")
    for _ in range(3):
        grow(run, rng, 400)
        svc.cycle(force=True)
    state_dir = svc.state_dir
    svc.finish()
    kept = loglik_bytes(state_dir, "r")
    assert 0 < kept <= 3 * (KEEP_WINDOW + 512) * N * 8
    with History(state_dir / "history.sqlite") as writer:
        writer.set_run_state("r", "finished")
        before = writer.latest_snapshot("r")
    assert main(["prune", str(state_dir)]) == 0
    assert "r: freed" in capsys.readouterr().out
    after = loglik_bytes(state_dir, "r")
    assert after < kept
    again = Service(root, every=0.0, keep_draws="tail")
    s = scores_of(again, "r")
    assert again.runs["r"].scorer.draws == 3600
    assert s["loo"]["elpd"] == pytest.approx(before["loo_elpd"], rel=1e-12)
    again.close()


def test_switching_to_all_after_tail_never_rereads_dropped_draws(root, tmp_path):
    """A run kept with tail and later watched with all: no tail rebuild from the missing draws (the
    scorer has no reader), the scores go on from the checkpoint."""
    rng = np.random.default_rng(15)
    run = root / "r"
    describe(run, draws_expected=3 * 3000)
    svc = Service(root, every=0.0, checkpoint_every=0, keep_draws="tail")
    for _ in range(4):
        grow(run, rng, 300)
        svc.cycle(force=True)
    svc.finish()
    svc = Service(root, every=0.0, checkpoint_every=0, keep_draws="all")
    try:
        assert svc.runs["r"].scorer.reader is None
        grow(run, rng, 300)
        svc.cycle(force=True)
        row = svc.history.latest_snapshot("r")
        assert row["draws_per_chain"] == 1500 and svc.runs["r"].aside_reason is None
        # the checkpoint carried the last joint-MCSE pass (a window pass of tail): it stands, noted
        assert "joint MCSE from the last pass (over 512 draws per chain" in row["retention_note"]
        assert row["loo_mcse"] is not None
    finally:
        svc.finish()


def test_lost_checkpoint_after_drops_sets_the_run_aside_with_a_reason(root):
    rng = np.random.default_rng(16)
    run = root / "r"
    describe(run, draws_expected=3 * 3000)
    svc = Service(root, every=0.0, checkpoint_every=0, keep_draws="none")
    for _ in range(3):
        grow(run, rng, 300)
        svc.cycle(force=True)
    svc.finish()
    checkpoint_path(svc.state_dir, "r").unlink()
    svc = Service(root, every=0.0, keep_draws="none")
    try:
        state = svc.runs["r"]
        assert state.scorer is None and "cannot be rebuilt" in state.aside_reason
        assert any(e["kind"] == "scores_lost" for e in svc.history.events(run="r"))
        assert svc.history.run("r")["state"] == "set_aside"
        svc.cycle(force=True)  # the loop goes on
    finally:
        svc.finish()


@pytest.mark.slow
def test_sigkill_of_a_watch_process_with_keep_draws_tail_loses_nothing(root, tmp_path):
    rng = np.random.default_rng(17)
    run = root / "r"
    describe(run, draws_expected=3 * 4000)
    state = tmp_path / "state"

    def watch(seconds=None):
        extra = ["--seconds", str(seconds)] if seconds else []
        return subprocess.Popen([sys.executable, "-m", "chainvigil.cli", "watch", str(root), "--headless",
                                 "--poll", "--every", "0.2", "--state", str(state), "--keep-draws", "tail",
                                 *extra], stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                                cwd=PROJECT)

    # a clean stop writes the checkpoint and drops what it covers; then kills at any moment
    first = watch(seconds=5)
    for _ in range(2):
        grow(run, rng, 600)
        time.sleep(1.5)
    out, _ = first.communicate(timeout=180)
    assert first.returncode == 0, out
    from chainvigil.storage.draws import DrawStore
    assert DrawStore(state / "draws.zarr").kept_from("r", "a") > 0
    for _ in range(2):
        proc = watch()
        for _ in range(3):
            grow(run, rng, 200)
            time.sleep(1.5)
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=30)
    final = watch(seconds=4)
    out, _ = final.communicate(timeout=180)
    assert final.returncode == 0, out
    svc = Service(root, state, every=0.0, keep_draws="tail")
    reference = Service(root, tmp_path / "reference", every=0.0)
    reference.cycle(force=True)
    try:
        assert svc.store.kept_from("r", "a") > 0  # draws were dropped on the way
        for c in CHAINS:
            np.testing.assert_array_equal(svc.store.read_draw_ids("r", c), np.arange(1, 2401))
        assert svc.runs["r"].scorer.draws == reference.runs["r"].scorer.draws == 3 * 2400
        assert_same_scores(scores_of(svc, "r"), scores_of(reference, "r"))
    finally:
        svc.close()
        reference.close()
