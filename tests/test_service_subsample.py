"""Subsampled scoring through the real service (``watch --subsample M``): small n, small forced m.

Real parts only: run folders written by the real ``ChainWriter`` (NPZ chunks), the real ``Service``
with its zarr store and SQLite history in tmp_path, the real Textual app via ``run_test()``.  The
reference is ``SubsampledScorer`` (chainvigil.estimators.subsample) fed the same post-warm-up draws
with the same sample: the difference estimator of Magnusson, Andersen, Jonasson & Vehtari (2019,
ICML), checked against the full PSIS-LOO in tests/test_subsample.py.
"""
from __future__ import annotations

import asyncio
import json
import math

import numpy as np
import pytest

from _ar1_model import ar1_normal_loglik
from chainvigil import verdict as verdicts
from chainvigil.estimators.subsample import SubsampledScorer
from chainvigil.longrun import RunSubsampledScorer, checkpoint_path
from chainvigil.service import Service
from chainvigil.storage.history import HistoryReader, SNAPSHOT_FIELDS, snapshot_record
from chainvigil.subsampling import SUBSAMPLE_DIR, run_seed, subsample_size
from chainvigil.writer import ChainWriter

N, M = 120, 24
CHAINS = ("a", "b")


def loglik(rng, draws, n=N):
    """y_i ~ N(mu, 1) at AR(1) draws of mu around 0, a few outlying observations."""
    return ar1_normal_loglik(rng, draws, n, rho=0.6, step_sd=0.15, outlier_every=17)


def grow(run_dir, rng, draws=60, kept=None):
    for c in CHAINS:
        ll, mu = loglik(rng, draws)
        with ChainWriter(run_dir, c, param_names=("mu",)) as w:
            w.append(ll, mu)
        if kept is not None:
            kept.setdefault(c, []).append(ll)



def reference(kept, sample, r_eff):
    sc = SubsampledScorer(N, M, sample=sample, expected_draws=sum(sum(b.shape[0] for b in v) for v in kept.values()))
    for c in sorted(kept):
        for block in kept[c]:
            sc.add(c, block)
    return sc.scores(r_eff)


def test_the_rule_that_picks_m():
    assert subsample_size(1000, 100, None) == 100
    assert subsample_size(100, 100, None) is None  # m >= n: the full estimate
    assert subsample_size(300_000, None, 200_000) == 2_000
    assert subsample_size(150_000, None, 200_000) is None
    assert subsample_size(10**6, None, 0) is None  # 0: never automatically


def test_subsampled_run_scores_as_the_subsampled_scorer_and_the_history_says_so(root):
    rng = np.random.default_rng(3)
    kept: dict = {}
    grow(root / "big", rng, kept=kept)
    lines = []
    svc = Service(root, every=0.0, subsample=M, report=lines.append, checkpoint_every=0)
    try:
        svc.cycle(force=True)
        state = svc.runs["big"]
        scorer = state.scorer
        assert isinstance(scorer, RunSubsampledScorer) and scorer.m == M and scorer.n == N
        # the same sample as the seed rule gives, recorded in the state folder
        assert np.array_equal(scorer.sample, np.sort(np.random.default_rng(run_seed("big")).choice(N, M, replace=False)))
        rec = json.loads((svc.state_dir / SUBSAMPLE_DIR / "big.json").read_text())
        assert rec["sample"] == scorer.sample.tolist() and rec["n"] == N
        # the store keeps the sampled columns only
        assert svc.store.read_loglik("big", "a").shape == (60, M)
        ref = reference(kept, scorer.sample, scorer.r_eff())
        snap = svc.history.latest_snapshot("big")
        assert math.isclose(snap["loo_elpd"], ref.loo["elpd"], rel_tol=1e-9)
        assert math.isclose(snap["loo_se"], ref.loo["se"], rel_tol=1e-9)
        assert math.isclose(snap["loo_se_subsample"], ref.subsampled["se_subsample"], rel_tol=1e-9)
        assert math.isclose(snap["waic_elpd"], ref.waic["elpd"], rel_tol=1e-9)
        assert (snap["loo_subsample_m"], snap["loo_subsample_n"]) == (M, N)
        assert ref.subsampled["se_subsample"] > 0
        # loo_mcse is the draws' Monte Carlo error alone (the subsampling SE is its own column): the
        # scorer's influence MCSE, which depends a little on the order the draws arrived in (each
        # draw's influence is taken at the running state), hence the tolerance
        assert math.isclose(snap["loo_mcse"], ref.loo["mcse"], rel_tol=0.05)
        assert ref.loo["mcse_method"] == "joint"
        assert math.isclose(snap["loo_mcse"], scorer.draws_mcse(), rel_tol=1e-12)
        # pointwise rows: the sampled observations only, with their exact PSIS values
        rows = svc.history.pointwise("big")
        assert [r["obs"] for r in rows] == scorer.sample.tolist()
        assert np.allclose([r["elpd_loo"] for r in rows], ref.loo_pointwise[scorer.sample], rtol=1e-9)
        # JSON record and headless line
        record = snapshot_record(snap)
        assert record["loo"]["subsampled"]["m"] == M and record["loo"]["subsampled"]["n"] == N
        assert any("exact on 24 of 120 obs, sampling ±" in line for line in lines)
        assert set(SNAPSHOT_FIELDS) >= {"loo_subsample_m", "loo_subsample_n", "loo_se_subsample"}
        # the HTML report says so too, with the exact figures
        pytest.importorskip("matplotlib")
        from chainvigil.report import build_report
        html = build_report(svc.history)
        assert f'data-figure="loo_subsample_m" data-value="{M}"' in html
        assert f'data-figure="loo_se_subsample" data-value="{snap["loo_se_subsample"]!r}"' in html
    finally:
        svc.finish()


def test_full_run_has_no_subsampled_fields(root):
    rng = np.random.default_rng(4)
    grow(root / "small", rng)
    svc = Service(root, every=0.0, checkpoint_every=0)
    try:
        svc.cycle(force=True)
        snap = svc.history.latest_snapshot("small")
        assert snap["loo_subsample_m"] is None and snapshot_record(snap)["loo"]["subsampled"] is None
        assert len(svc.history.pointwise("small")) == N
    finally:
        svc.finish()


def test_verdict_judges_the_draws_error_and_reports_the_subsampling_se_beside_it():
    data = {"loo": {"elpd": -10.0, "se": 1.0, "mcse": 0.16, "p_eff": 1.0,
                    "subsampled": {"m": 10, "n": 100, "se_subsample": 0.06}},
            "pareto_k": {"max": 0.1, "threshold": 0.7, "above": 0, "above_observations": [], "values": []},
            "mixing": None, "draws": 800, "chains": 4}
    v = verdicts.evaluate(data, [], chains=4, draws_per_chain=200, draw_rate=None,
                          targets=verdicts.Targets())
    check = next(c for c in v["checks"] if c["name"] == "mcse")
    # only the draws' error, 0.16 against the goal 0.1: S' = 200 * (0.16 / 0.1)^2 = 512 -> 312 more
    assert check["ok"] is False and check["value"] == 0.16 and check["more_draws"] == 312
    assert "subsampling SE 0.06" in check["note"]
    # a subsampling SE above the goal blocks nothing: more draws cannot lower it
    data["loo"]["subsampled"]["se_subsample"] = 0.4
    data["loo"]["mcse"] = 0.05
    v = verdicts.evaluate(data, [], chains=4, draws_per_chain=200, draw_rate=None,
                          targets=verdicts.Targets())
    check = next(c for c in v["checks"] if c["name"] == "mcse")
    assert check["ok"] is True and check["margin"] is True and check["more_draws"] == 0
    assert "subsampling SE 0.4" in check["note"] and "larger subsample" in check["note"]


def _local_run(run_dir, rng, draws, y, tau=0.5):
    """Four chains of independent posterior draws for y_i ~ N(theta_i, 1), theta_i ~ N(0, tau^2): one
    parameter per observation (theta_i | y_i ~ N(y_i v, v), v = 1 / (1 + 1/tau^2); Gelman et al.
    BDA3 ch. 5), so PSIS-LOO and its WAIC approximation differ observation by observation."""
    v = 1.0 / (1.0 + 1.0 / tau**2)
    for c in ("c0", "c1", "c2", "c3"):
        theta = rng.normal(y * v, np.sqrt(v), size=(draws, y.size))
        ll = -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, :] - theta) ** 2
        with ChainWriter(run_dir, c, param_names=("theta_1",)) as w:
            w.append(ll, theta[:, :1])


def test_a_run_with_a_large_subsampling_se_reaches_enough_once_its_draws_error_is_small(root):
    """The subsampling SE (here above the 0.1 goal) cannot be lowered by draws, so it does not hold
    the verdict back: the run gets "enough" on its draws' error, with the SE named in the note."""
    rng = np.random.default_rng(12)
    y = rng.normal(0.0, np.sqrt(1.25), N)
    _local_run(root / "big", rng, 3200, y)
    svc = Service(root, every=0.0, subsample=M, checkpoint_every=0)
    try:
        svc.cycle(force=True)
        _local_run(root / "big", rng, 800, y)  # the settled window needs a trail spanning a fifth
        svc.cycle(force=True)
        snap = svc.history.latest_snapshot("big")
        verdict = json.loads(snap["verdict"]) if isinstance(snap["verdict"], str) else snap["verdict"]
        check = next(c for c in verdict["checks"] if c["name"] == "mcse")
        assert snap["loo_se_subsample"] > 0.1 and snap["loo_mcse"] < 0.09, (snap["loo_se_subsample"], snap["loo_mcse"])
        assert check["ok"] is True and "subsampling SE" in check["note"]
        assert (root / "big" / "ENOUGH.json").is_file(), [(c["name"], c["ok"], c["value"], c["note"]) for c in verdict["checks"]]
        assert svc.history.run("big")["state"] == "enough"
        # under the old rule, sqrt(MCSE² + SE_sub²) against the goal, this run could never stop
        assert math.hypot(snap["loo_mcse"], snap["loo_se_subsample"]) > 0.1
    finally:
        svc.finish()


def test_restart_resumes_the_subsampled_scorer_from_its_checkpoint(root):
    rng = np.random.default_rng(5)
    kept: dict = {}
    grow(root / "big", rng, kept=kept)
    svc = Service(root, every=0.0, subsample=M, checkpoint_every=0)
    svc.cycle(force=True)
    sample = svc.runs["big"].scorer.sample.copy()
    svc.finish()  # a clean stop writes the checkpoint
    assert checkpoint_path(svc.state_dir, "big").is_file()
    grow(root / "big", rng, kept=kept)
    # the option is not given again: the run keeps its recorded sample
    svc = Service(root, every=0.0, checkpoint_every=0)
    try:
        scorer = svc.runs["big"].scorer
        assert isinstance(scorer, RunSubsampledScorer) and np.array_equal(scorer.sample, sample)
        assert scorer.draws == 120  # from the checkpoint, nothing re-streamed
        svc.cycle(force=True)
        ref = reference(kept, sample, scorer.r_eff())
        snap = svc.history.latest_snapshot("big")
        assert snap["draws"] == 240
        assert math.isclose(snap["loo_elpd"], ref.loo["elpd"], rel_tol=1e-9)
        assert math.isclose(snap["loo_se_subsample"], ref.subsampled["se_subsample"], rel_tol=1e-9)
    finally:
        svc.finish()


def test_restart_with_a_checkpoint_behind_the_commit_log_reads_the_run_again(root):
    rng = np.random.default_rng(6)
    kept: dict = {}
    grow(root / "big", rng, kept=kept)
    svc = Service(root, every=0.0, subsample=M, checkpoint_every=1e9)
    svc.cycle(force=True)  # checkpoint of the first 120 draws
    grow(root / "big", rng, kept=kept)
    svc.cycle()  # 240 committed, the checkpoint is not due
    assert svc.history.committed("big", "a")["draws"] == 120
    svc.passes.worker.close()
    svc.close()  # a kill: no final pass, no new checkpoint
    svc = Service(root, every=0.0, subsample=M, checkpoint_every=0)
    try:
        events = [e for e in svc.history.events() if e["kind"] == "subsample_restream"]
        assert events and "fewer draws than the commit log" in events[-1]["message"]
        svc.cycle(force=True)
        scorer = svc.runs["big"].scorer
        assert scorer.draws == 240  # every draw once, none twice
        ref = reference(kept, scorer.sample, scorer.r_eff())
        snap = svc.history.latest_snapshot("big")
        assert snap["draws"] == 240
        assert math.isclose(snap["loo_elpd"], ref.loo["elpd"], rel_tol=1e-9)
    finally:
        svc.finish()


def test_screen_shows_the_subsampled_mark(root):
    rng = np.random.default_rng(7)
    grow(root / "big", rng)
    svc = Service(root, every=0.0, subsample=M, checkpoint_every=0)
    try:
        svc.cycle(force=True)
    finally:
        svc.finish()
    history_path = svc.state_dir / "history.sqlite"

    async def look():
        from chainvigil.tui.app import VigilApp
        from chainvigil.tui.headline import Headline

        app = VigilApp(history_path, refresh=0.1)
        text = ""
        async with app.run_test(size=(160, 50)) as pilot:
            for _ in range(100):
                await pilot.pause(0.1)
                if app.view is not None and app.view.snap is not None:
                    text = app.query_one(Headline).plain
                    if "sampled" in text:
                        break
        return text

    text = asyncio.run(look())
    assert "sampled 24 of 120 obs · ±" in text and "from sampling" in text
    assert "above limit 0 of 24 sampled" in text or "of 24 sampled" in text


def test_subsampled_state_round_trip_gives_the_same_scores():
    """to_state / from_state (the checkpoint's arrays) and then more draws == the scorer never stopped."""
    rng = np.random.default_rng(8)
    blocks = [loglik(rng, 30)[0] for _ in range(4)]
    whole = RunSubsampledScorer(N, M, 3, expected_draws=120)
    part = RunSubsampledScorer(N, M, 3, expected_draws=120)
    for i, b in enumerate(blocks[:2]):
        whole.add(f"c{i}", b)
        part.add(f"c{i}", b)
    state = {k: np.asarray(v) for k, v in part.to_state().items()}
    resumed = RunSubsampledScorer.from_state(state)
    for i, b in enumerate(blocks[2:]):
        whole.add(f"c{i}", b)
        resumed.add(f"c{i}", b)
    a, b = whole.scores(whole.r_eff()), resumed.scores(resumed.r_eff())
    assert np.array_equal(whole.sample, resumed.sample)
    for key in ("elpd", "se", "mcse", "p_eff"):
        assert math.isclose(a.loo[key], b.loo[key], rel_tol=1e-12), key
    assert a.subsampled["se_subsample"] == pytest.approx(b.subsampled["se_subsample"], rel=1e-12)
    assert a.dic["elpd"] == pytest.approx(b.dic["elpd"], rel=1e-12)


def test_a_chunk_too_large_for_the_limit_says_how_many_draws_fit(tmp_path):
    from chainvigil.problems import InputProblem
    from chainvigil.readers import ReaderLimits, load_npz_chunk

    path = tmp_path / "c.npz"
    np.savez(path, loglik=np.zeros((10, 100_000)))  # 8 MB
    with pytest.raises(InputProblem) as err:
        load_npz_chunk(path, limits=ReaderLimits(max_member_bytes=4 << 20))
    assert err.value.kind == "limit_exceeded"
    assert "max_member_bytes" in str(err.value) and "write smaller chunks" in str(err.value)


def test_a_run_scored_in_full_before_stays_full_when_the_option_appears(root):
    rng = np.random.default_rng(9)
    grow(root / "r", rng)
    svc = Service(root, every=0.0, checkpoint_every=0)
    svc.cycle(force=True)
    svc.finish()
    grow(root / "r", rng)
    svc = Service(root, every=0.0, subsample=M, checkpoint_every=0)
    try:
        svc.cycle(force=True)
        assert not isinstance(svc.runs["r"].scorer, RunSubsampledScorer)
        snap = svc.history.latest_snapshot("r")
        assert snap["draws"] == 240 and snap["loo_subsample_m"] is None
    finally:
        svc.finish()


@pytest.mark.slow
def test_watch_command_with_subsample_prints_the_mark(root):
    import subprocess
    import sys

    grow(root / "big", np.random.default_rng(10))
    proc = subprocess.run([sys.executable, "-m", "chainvigil.cli", "watch", str(root), "--headless",
                           "--subsample", str(M), "--every", "0", "--seconds", "3"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert f"exact on {M} of {N} obs, sampling ±" in proc.stdout
    out = subprocess.run([sys.executable, "-m", "chainvigil.cli", "history", str(root / ".chainvigil"), "--json"],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    record = json.loads(out.stdout)[-1]
    assert record["loo"]["subsampled"]["m"] == M and record["loo"]["subsampled"]["n"] == N
    assert record["loo"]["subsampled"]["se_subsample"] > 0
    assert record["loo"]["mcse"] > 0  # the draws' part; the subsampling SE is reported beside it
    history = HistoryReader(root / ".chainvigil" / "history.sqlite")
    try:
        assert history.latest_snapshot("big")["loo_subsample_m"] == M
        # the event, when the run is first seen (``chainvigil events``, the screen's event list)
        assert any(e["kind"] == "subsampled" and "random subsample of 24 of them" in e["message"]
                   for e in history.events())
    finally:
        history.close()


def test_a_subsampled_run_set_aside_is_read_again_and_counts_every_draw_once(root):
    rng = np.random.default_rng(11)
    kept: dict = {}
    grow(root / "big", rng, kept=kept)
    svc = Service(root, every=0.0, subsample=M, checkpoint_every=1e9)
    try:
        svc.cycle(force=True)  # checkpoint of the first 120 draws
        grow(root / "big", rng, kept=kept)
        svc.cycle()  # 240 committed, no new checkpoint
        # the per-run error boundary: restore from the commit log (the checkpoint is behind it)
        svc.ingest.set_aside(svc.runs["big"], "scoring", RuntimeError("a failure for the test"))
        assert any(e["kind"] == "subsample_restream" for e in svc.history.events())
        grow(root / "big", rng, kept=kept)  # the folder changes: the run is taken back
        svc.cycle(force=True)
        scorer = svc.runs["big"].scorer
        assert scorer.draws == 360 and svc.runs["big"].aside_reason is None
        ref = reference(kept, scorer.sample, scorer.r_eff())
        snap = svc.history.latest_snapshot("big")
        assert snap["draws"] == 360
        assert math.isclose(snap["loo_elpd"], ref.loo["elpd"], rel_tol=1e-9)
    finally:
        svc.finish()


def test_keep_draws_tail_leaves_a_subsampled_run_its_sampled_columns(root):
    """--keep-draws drops only what a checkpoint of a full run replaces: a subsampled run rebuilds its
    sampled tails from the store, so its m columns stay whole while it scores as the reference."""
    rng = np.random.default_rng(11)
    kept: dict = {}
    svc = Service(root, every=0.0, subsample=M, keep_draws="tail", keep_window=0, checkpoint_every=0)
    try:
        for _ in range(3):
            grow(root / "big", rng, draws=200, kept=kept)
            svc.cycle(force=True)
        scorer = svc.runs["big"].scorer
        assert isinstance(scorer, RunSubsampledScorer)
        assert all(svc.store.kept_from("big", c) == 0 for c in CHAINS)  # nothing dropped
        assert svc.store.read_loglik("big", "a").shape == (600, M)
        ref = reference(kept, scorer.sample, scorer.r_eff())
        assert math.isclose(svc.history.latest_snapshot("big")["loo_elpd"], ref.loo["elpd"], rel_tol=1e-9)
    finally:
        svc.finish()
