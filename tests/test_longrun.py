"""Long runs through the real service: the joint-MCSE pass off the loop, checkpoints and restarts,
the history's size (geometric thinning), the liveness row.

Real parts only: real zarr stores and SQLite files in tmp_path, the real ``Service`` and
``ChainWriter``; the slow pass is made slow by the service's ``pass_delay`` knob, not by a mock."""

from __future__ import annotations

import os
import sqlite3
import sys
import threading
import time

import numpy as np
import pytest

from _ar1_model import ar1_normal_loglik
from chainvigil.longrun import RunScorer, checkpoint_path, load_checkpoint, save_checkpoint
from chainvigil.service import Service
from chainvigil.storage.history import History
from chainvigil.writer import ChainWriter

N = 30


def loglik(rng, draws, n=N):
    """y_i ~ N(mu, 1) at AR(1) draws of mu (autocorrelated, so r_eff < 1)."""
    return ar1_normal_loglik(rng, draws, n)


def grow(run_dir, rng, chains=("a", "b", "c"), draws=40):
    for c in chains:
        with ChainWriter(run_dir, c, param_names=("mu",)) as w:
            w.append(*loglik(rng, draws))



@pytest.mark.slow
def test_snapshots_go_on_while_a_slow_joint_pass_runs(root):
    rng = np.random.default_rng(1)
    run = root / "r"
    grow(run, rng)
    svc = Service(root, every=0.0, pass_delay=4.0, checkpoint_every=0)
    try:
        svc.cycle(force=True)
        assert svc.passes.worker.busy("r")  # the first pass was started with the first snapshot ...
        t0 = time.time()
        for _ in range(3):  # ... and the loop does not wait for it
            grow(run, rng)
            svc.cycle()
        assert svc.passes.worker.busy("r") and time.time() - t0 < 4.0
        snaps = svc.history.snapshots(run="r")
        assert len(snaps) == 4 and [s["draws_per_chain"] for s in snaps] == [40, 80, 120, 160]
        assert all(s["r_eff_source"] == "streaming" and s["joint_pass"] is None for s in snaps)
        assert svc.passes.worker.wait(30)
        grow(run, rng)
        svc.cycle()
        last = svc.history.latest_snapshot("r")
        # the finished pass (over the first 40 draws per chain) gives its joint/independent ratio
        assert last["joint_pass"] == 40 and last["draws_per_chain"] == 200
    finally:
        svc.finish()


def test_restart_from_checkpoint_equals_restreamed_scorer(root, tmp_path):
    rng = np.random.default_rng(2)
    run = root / "r"
    grow(run, rng, draws=300)
    svc = Service(root, every=0.0, checkpoint_every=0)
    svc.cycle(force=True)
    path = checkpoint_path(svc.state_dir, "r")
    assert path.is_file()
    svc.close()
    grow(run, rng, draws=100)  # draws committed after the checkpoint are streamed from the store ...
    svc = Service(root, every=0.0, checkpoint_every=1e9)
    svc.cycle(force=True)
    from_ckpt = svc.runs["r"].scorer
    assert from_ckpt.draws == 1200
    svc.close()
    path.unlink()  # ... and without any checkpoint every draw is re-streamed
    svc = Service(root, every=0.0, checkpoint_every=1e9)
    restreamed = svc.runs["r"].scorer
    assert restreamed.draws == 1200
    r1, r2 = from_ckpt.r_eff(), restreamed.r_eff()
    np.testing.assert_allclose(r1, r2, rtol=1e-9)
    from_ckpt.tail_lag = restreamed.tail_lag = 0.0  # the same draws: exact tails on both sides
    a, b = from_ckpt.scores(r1).to_dict(), restreamed.scores(r2).to_dict()
    for key in ("elpd", "se", "p_eff", "mcse"):
        assert a["loo"][key] == pytest.approx(b["loo"][key], rel=1e-9)
        if key != "mcse":
            assert a["waic"][key] == pytest.approx(b["waic"][key], rel=1e-9)
    np.testing.assert_allclose(a["pareto_k"]["values"], b["pareto_k"]["values"], rtol=1e-9)
    svc.close()


def test_a_restart_keeps_the_last_joint_pass_and_the_mixing_in_force(root):
    """The checkpoint records the last joint-MCSE pass and the latest snapshot the mixing figures in
    force: the first snapshot after a restart starts no pass over every stored draw and does not
    reread the parameter draws while the run has grown by less than the schedules ask."""
    from chainvigil import mixing_schedule

    rng = np.random.default_rng(12)
    run = root / "r"
    grow(run, rng, draws=600)
    svc = Service(root, every=0.0, checkpoint_every=1e9)
    svc.cycle(force=True)  # starts the first joint-MCSE pass
    svc.finish()  # the clean stop waits for it, snapshots with it and writes the checkpoint
    joint = svc.runs["r"].joint_mcse
    assert joint is not None and svc.runs["r"].r_eff_per_chain == 600
    grow(run, rng, draws=4)
    again = Service(root, every=0.0, checkpoint_every=1e9)
    state = again.runs["r"]
    assert (state.r_eff_per_chain, state.joint_mcse) == (600, joint)
    assert state.mixing_cache is not None and state.mixing_cache[0] == 600
    reads = []
    original = again.store.read_params
    again.store.read_params = lambda *a, **kw: reads.append(a) or original(*a, **kw)
    again.cycle()
    latest = again.history.latest_snapshot("r")
    assert not again.passes.worker.busy("r")  # 604 < 1.25 x 600: no new pass
    assert reads == [] and latest["draws_per_chain"] == 604 and latest["mixing_draws"] == 600
    assert latest["joint_pass"] == 600
    # grown past the mixing schedule: recomputed over every draw, and the row says so
    grow(run, rng, draws=40)
    again.cycle()
    latest = again.history.latest_snapshot("r")
    assert reads and latest["mixing_draws"] == latest["draws_per_chain"] == 644
    assert 644 < (1 + mixing_schedule.MIXING_GROWTH) ** 2 * 600
    again.finish()


def test_checkpoint_now_writes_what_the_commit_log_holds(root):
    """``Service.checkpoint_now`` (what the clean stop and the long-run benchmark call) writes each
    run's checkpoint at once, even when the schedule says not yet, covering the committed draws."""
    rng = np.random.default_rng(21)
    grow(root / "r", rng)
    svc = Service(root, every=0.0, checkpoint_every=1e12)  # never due by the schedule
    try:
        svc.cycle()
        assert not checkpoint_path(svc.state_dir, "r").exists()
        svc.checkpoint_now()
        committed = {c: svc.history.committed("r", c)["draws"] for c in ("a", "b", "c")}
        scorer, held = load_checkpoint(checkpoint_path(svc.state_dir, "r"), n=N, committed=committed)
        assert held == committed == {"a": 40, "b": 40, "c": 40} and scorer.draws == 120
    finally:
        svc.finish()


def test_checkpoint_newer_than_the_commit_log_is_discarded(root):
    """A SIGKILL after the checkpoint but before a manifest commit it covers cannot happen with the
    write order; a checkpoint that covers more than the commit log anyway is detected and ignored."""
    rng = np.random.default_rng(3)
    run = root / "r"
    grow(run, rng, draws=100)
    svc = Service(root, every=0.0, checkpoint_every=0)
    svc.cycle(force=True)
    scorer = svc.runs["r"].scorer
    # a checkpoint from a later moment: 50 more draws per chain than committed
    ahead = RunScorer.from_state(scorer.to_state())
    for c in ("a", "b", "c"):
        ahead.add(c, loglik(rng, 50)[0])
    save_checkpoint(checkpoint_path(svc.state_dir, "r"), ahead, ahead.chain_draws())
    svc.close()
    svc = Service(root, every=0.0)
    assert svc.runs["r"].scorer.draws == 300  # re-streamed from the store, not the checkpoint's 450
    events = [e for e in svc.history.events() if e["kind"] == "checkpoint_ignored"]
    assert len(events) == 1 and "newer than the commit log" in events[0]["message"]
    svc.close()
    # a torn file is ignored the same way
    checkpoint_path(svc.state_dir, "r").write_bytes(b"PK\x03\x04 not a whole file")
    svc = Service(root, every=0.0)
    assert svc.runs["r"].scorer.draws == 300
    assert any("unreadable checkpoint" in e["message"] for e in svc.history.events()
               if e["kind"] == "checkpoint_ignored")
    svc.close()


def test_checkpoint_loads_without_pickles_and_checks_n(root, tmp_path):
    rng = np.random.default_rng(4)
    scorer = RunScorer(N)
    for c in ("a", "b"):
        scorer.add(c, loglik(rng, 64)[0])
    path = tmp_path / "ck.npz"
    save_checkpoint(path, scorer, {"a": 64, "b": 64})
    with np.load(path, allow_pickle=False) as data:
        assert all(data[k].dtype != object for k in data.files)
    loaded, held = load_checkpoint(path, n=N, committed={"a": 64, "b": 100})
    assert held == {"a": 64, "b": 64}
    np.testing.assert_array_equal(loaded.r_eff(), scorer.r_eff())
    with pytest.raises(ValueError, match="n=31"):
        load_checkpoint(path, n=31, committed={"a": 64, "b": 64})
    with pytest.raises(ValueError, match="draws per chain"):
        save_checkpoint(path, scorer, {"a": 64, "b": 63})


@pytest.mark.slow
def test_pointwise_history_is_geometric_in_draws(root):
    """Hundreds of snapshots keep O(log draws) pointwise rows: the first, the latest, and points
    each >= 1.25 x the draws of the previous kept one; the screen's k-hat chart reads those."""
    rng = np.random.default_rng(5)
    run = root / "r"
    grow(run, rng, draws=10)
    svc = Service(root, every=0.0, checkpoint_every=1e9)
    for _ in range(120):
        grow(run, rng, draws=10)
        svc.cycle()
    svc.close()
    con = sqlite3.connect(svc.state_dir / "history.sqlite")
    kept = [r[0] for r in con.execute(
        "SELECT DISTINCT s.draws_per_chain FROM pointwise_history h JOIN snapshots s ON "
        "s.id = h.snapshot_id ORDER BY s.id")]
    snaps = [r[0] for r in con.execute("SELECT draws_per_chain FROM snapshots ORDER BY id")]
    con.close()
    assert len(snaps) >= 120
    assert kept[0] == snaps[0] and kept[-1] == snaps[-1]
    assert all(b >= 1.25 * a for a, b in zip(kept[:-2], kept[1:-1]))
    # log(1210/10)/log(1.25) = 21.5: a bounded number of points, not one per 5 snapshots
    assert len(kept) <= 24
    from chainvigil.tui.loader import Loader, Request  # the screen's reader

    view = Loader(svc.state_dir / "history.sqlite").load(Request(run="r"))
    draws = [d for _, d, _ in view.pointwise_trail]
    # the chart gets the first, spaced points and the latest (total draws = 3 chains x per chain)
    assert draws[0] == 3 * kept[0] and draws[-1] == 3 * kept[-1] and len(draws) >= 10
    assert all(len(rows) == N for _, _, rows in view.pointwise_trail)


@pytest.mark.slow
def test_screen_says_live_only_while_the_service_beats(root):
    """The real service in a thread, the real screen through its pilot: LIVE while the service runs,
    "service stopped at HH:MM" after it stopped; the run turns paused once no draws arrive."""
    import asyncio
    import threading

    from chainvigil.tui.app import VigilApp
    from chainvigil.tui.cursor import CursorBar

    rng = np.random.default_rng(6)
    run = root / "r"
    grow(run, rng, draws=50)
    svc = Service(root, every=0.2, checkpoint_every=1e9)
    thread = threading.Thread(target=svc.run, kwargs={"duration": 60}, daemon=True)
    thread.start()
    path = svc.state_dir / "history.sqlite"

    async def main():
        app = VigilApp(path, refresh=0.1)
        async with app.run_test(size=(120, 40)) as pilot:
            async def until(cond, timeout=20.0):
                t0 = time.monotonic()
                while not cond():
                    assert time.monotonic() - t0 < timeout, app.query_one(CursorBar).plain
                    await pilot.pause(0.05)
            await until(lambda: app.view is not None and app.view.snap is not None)
            await until(lambda: "LIVE" in app.query_one(CursorBar).plain)
            # no new draws: the run is paused (the state follows activity without a new snapshot)
            await until(lambda: History(path, readonly=True).run("r")["state"] == "paused")
            svc.stop()
            thread.join(30)
            await until(lambda: "service stopped at" in app.query_one(CursorBar).plain)
            assert "LIVE" not in app.query_one(CursorBar).plain
    asyncio.run(main())
    row = History(path, readonly=True).service()
    assert row["stopped_at"] is not None and row["crashed_at"] is None


def test_prune_frees_finished_runs_and_keeps_what_the_history_and_a_restart_need(root, capsys):
    from chainvigil.cli import main

    rng = np.random.default_rng(7)
    run = root / "r"
    grow(run, rng, draws=600)
    grow(root / "busy", rng, draws=600)
    svc = Service(root, every=0.0, checkpoint_every=0)
    svc.cycle(force=True)
    state_dir = svc.state_dir
    # the service holds the lock: prune refuses
    assert main(["prune", str(state_dir)]) == 2
    assert "stop it first" in capsys.readouterr().err
    svc.finish()
    with History(state_dir / "history.sqlite") as writer:  # as the service marks a run whose chains
        writer.set_run_state("r", "finished")               # stopped (30 minutes without draws)
        before = writer.latest_snapshot("r")
    assert main(["prune", str(state_dir)]) == 0
    out = capsys.readouterr().out
    # 3 chains x 512 whole draws (2 chunks of 256) x 30 observations x 8 bytes = 368,640 bytes
    assert "r: freed 0.4 MB" in out and "busy: kept (state 'gathering'" in out
    again = Service(root, every=0.0)
    # the restart resumes from the checkpoint: no log-likelihood needed, the same scores
    assert again.runs["r"].scorer.draws == 1800
    assert again.store.kept_from("r", "a") == 512
    with pytest.raises(ValueError, match="dropped"):
        again.store.read_loglik("r", "a", draws=slice(0, 10))
    np.testing.assert_array_equal(again.store.read_params("r", "a")[:, 0].shape, (600,))
    s = again.runs["r"].scorer.scores(again.runs["r"].scorer.r_eff()).to_dict()
    assert s["loo"]["elpd"] == pytest.approx(before["loo_elpd"], rel=1e-12)
    again.close()


@pytest.mark.slow
def test_snapshot_interval_stretches_while_a_run_is_unchanged(root):
    """every = 0.3 s; once the run's state and pass/fail have not changed for stretch_after = 1 s,
    the interval grows with the stable time (here to about 0.3 x stable / 1 s), so fewer snapshots
    are written for the same arrivals than without stretching."""
    counts = {}
    for stretch in (False, True):
        r = root / f"s{int(stretch)}"
        r.mkdir()
        rng = np.random.default_rng(8)
        grow(r / "run", rng, draws=20)
        svc = Service(r, every=0.3, stretch=stretch, stretch_after=1.0, checkpoint_every=1e9)
        t_end = time.time() + 6.0
        while time.time() < t_end:
            grow(r / "run", rng, draws=4)
            svc.cycle()
            time.sleep(0.1)
        interval = svc.cadence.interval(svc.runs["run"], time.time())
        counts[stretch] = len(svc.history.snapshots(run="run"))
        svc.close()
        if stretch:
            assert interval > 0.3  # stretched: the state has not changed for seconds
        else:
            assert interval == 0.3
    assert counts[True] < counts[False]


def test_a_pass_collected_while_another_run_is_scored_is_for_the_next_snapshot(root):
    """In one pass every model is scored before any is judged and written, and scoring a run takes in
    every finished joint-MCSE pass.  A pass of run A taken in while run B is scored was not used by
    A's scores: A's row must not claim it, and A stays due until a snapshot uses it (a clean stop's
    final row then carries the exact joint MCSE of the batch score)."""
    from chainvigil.estimators import batch_scores

    rng = np.random.default_rng(5)
    for name in ("a", "b"):
        grow(root / name, rng, draws=40)
    svc = Service(root, every=0.0, checkpoint_every=0)
    try:
        svc.cycle(force=True)
        assert svc.passes.worker.wait(30)
        for name in ("a", "b"):
            grow(root / name, rng, draws=40)
        svc.scan()
        # the order of cycle(): score every model, then judge and write each
        item_a = svc._score(svc.runs["a"])  # uses the pass over 40 draws; starts one over 80
        assert svc.passes.worker.wait(30)
        item_b = svc._score(svc.runs["b"])  # takes in a's finished pass too
        assert svc.runs["a"].r_eff_per_chain == 80
        svc._finish(item_a, None)
        svc._finish(item_b, None)
        svc.ingest.commit_pending()
        row = svc.history.latest_snapshot("a")
        assert row["draws_per_chain"] == 80 and row["joint_pass"] == 40  # what its MCSE rests on
        assert svc.cadence.stale(svc.runs["a"])
        svc.cycle(force=True)  # as on a clean stop
        row = svc.history.latest_snapshot("a")
        assert row["joint_pass"] == 80
        scorer = svc.runs["a"].scorer
        stacked = np.stack([svc.store.read_loglik("a", c) for c in sorted(svc.store.chains("a"))])
        batch = batch_scores(stacked, r_eff=scorer.r_eff()).to_dict()
        assert row["loo_mcse"] == pytest.approx(batch["loo"]["mcse"], rel=1e-9)
    finally:
        svc.finish()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="per-thread priorities are a Linux feature")
def test_the_joint_pass_thread_runs_at_a_lower_priority_than_the_loop():
    from chainvigil.longrun import PASS_NICE, JointPassWorker

    worker = JointPassWorker()
    try:
        deadline = time.time() + 10
        tid = worker._thread.native_id
        own = os.getpriority(os.PRIO_PROCESS, threading.get_native_id())
        while os.getpriority(os.PRIO_PROCESS, tid) == own and time.time() < deadline:
            time.sleep(0.01)
        assert os.getpriority(os.PRIO_PROCESS, tid) == min(19, own + PASS_NICE)
        assert os.getpriority(os.PRIO_PROCESS, threading.get_native_id()) == own  # the loop's own is kept
    finally:
        worker.close()
