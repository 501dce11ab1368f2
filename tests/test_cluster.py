"""The service scoring on a real Dask cluster (distributed.LocalCluster, worker processes).

Reference: the default service (StreamingScorer in-process) on the same run folder, itself held to
the one-shot batch score in test_service.py; the snapshot must agree to 1e-9.
"""
from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest

from chainvigil.service import Service
from chainvigil.storage.history import History
from chainvigil.writer import write_run_info

from test_service import write_chain


N = 40
KEYS = ("loo_elpd", "loo_se", "loo_mcse", "loo_p_eff", "waic_elpd", "waic_se", "k_max", "rhat_max")


@pytest.fixture(scope="module")
def cluster():
    # imported here: the fast run (no cluster test) does not pay for importing distributed
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=40) as c:
        yield c


def make_run(root, rng):
    run = root / "lake-a"
    write_run_info(run, title="lake a", dataset="lakes", n_params=1)
    for c in range(3):
        write_chain(run, f"c{c}", rng, 200, fmt="npz", blocks=2, n=N)
    return run


@pytest.mark.slow
def test_service_on_a_cluster_writes_the_same_snapshot_as_the_default(tmp_path, cluster):
    from chainvigil.cluster import ClusterScoring

    root = tmp_path / "root"
    root.mkdir()
    make_run(root, np.random.default_rng(3))
    local = Service(root, tmp_path / "local", every=0.0)
    local.cycle(force=True)
    expected = local.history.latest_snapshot("lake-a")
    local.close()
    scoring = ClusterScoring(cluster.scheduler_address, shards=3)
    try:
        remote = Service(root, tmp_path / "remote", every=0.0, scorer_factory=scoring.scorer_factory)
        remote.cycle(force=True)
        state = remote.runs["lake-a"]
        assert type(state.scorer).__name__ == "ShardedScorer" and state.scorer.shards == 3
        got = remote.history.latest_snapshot("lake-a")
        remote.close()
    finally:
        scoring.close()
    assert got["draws"] == expected["draws"] == 1200
    for key in KEYS:
        assert got[key] == pytest.approx(expected[key], rel=1e-9), key


@pytest.mark.slow
def test_restart_on_a_cluster_rebuilds_the_shards_from_the_store(tmp_path, cluster):
    """After a restart the run's scorer is refilled from the draw store (ingest.recover); on a
    cluster that means the shards are rebuilt on the workers. New draws then score as locally."""
    from chainvigil.cluster import ClusterScoring

    root = tmp_path / "root"
    root.mkdir()
    run = make_run(root, np.random.default_rng(5))
    scoring = ClusterScoring(cluster.scheduler_address, shards=2)
    try:
        first = Service(root, tmp_path / "remote", every=0.0, scorer_factory=scoring.scorer_factory)
        first.cycle(force=True)
        first.close()
        write_chain(run, "c3", np.random.default_rng(6), 200, fmt="npz", blocks=2, n=N)
        again = Service(root, tmp_path / "remote", every=0.0, scorer_factory=scoring.scorer_factory)
        assert type(again.runs["lake-a"].scorer).__name__ == "ShardedScorer"
        again.cycle(force=True)
        got = again.history.latest_snapshot("lake-a")
        again.close()
    finally:
        scoring.close()
    local = Service(root, tmp_path / "local", every=0.0)
    local.cycle(force=True)
    expected = local.history.latest_snapshot("lake-a")
    local.close()
    assert got["draws"] == expected["draws"] == 1600
    for key in KEYS:
        assert got[key] == pytest.approx(expected[key], rel=1e-9), key


@pytest.mark.slow
def test_watch_command_with_cluster_address(tmp_path, cluster):
    root = tmp_path / "root"
    root.mkdir()
    make_run(root, np.random.default_rng(4))
    env = dict(os.environ)
    proc = subprocess.run([sys.executable, "-m", "chainvigil.cli", "watch", str(root), "--headless",
                           "--cluster", cluster.scheduler_address, "--shards", "2", "--every", "0",
                           "--seconds", "6"], capture_output=True, text=True, timeout=120, env=env)
    assert proc.returncode == 0, proc.stderr
    assert "Dask cluster" in proc.stdout and "2 shards per run" in proc.stdout
    local = Service(root, tmp_path / "local", every=0.0)
    local.cycle(force=True)
    expected = local.history.latest_snapshot("lake-a")
    local.close()
    history = History(root / ".chainvigil" / "history.sqlite")
    got = history.latest_snapshot("lake-a")
    assert got["draws"] == expected["draws"]
    for key in ("loo_elpd", "waic_elpd", "k_max"):
        assert got[key] == pytest.approx(expected[key], rel=1e-9), key


def test_shards_without_cluster_is_refused(tmp_path, capsys):
    # the command's own code in this process (the command as a process: test_watch_command_with_cluster_address)
    from chainvigil.cli import main

    assert main(["watch", str(tmp_path), "--headless", "--shards", "3", "--seconds", "1"]) == 2
    assert "--shards needs --cluster" in capsys.readouterr().err
    assert not (tmp_path / ".chainvigil").exists()  # refused before the service started
