"""The service as users run it: the `chainvigil` command in its own process, real sampler processes
writing real files, SIGKILL at random moments, and the JSON commands reading the history."""
from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import chainvigil.simulated_chains as simulated_chains
from chainvigil.oneshot import read_run_folder
from chainvigil.storage.draws import DrawStore

PROJECT = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.slow  # the chainvigil command as a process, with real samplers


def cli(*args, check=True, timeout=120):
    proc = subprocess.run([sys.executable, "-m", "chainvigil.cli", *map(str, args)], capture_output=True,
                          text=True, timeout=timeout, cwd=PROJECT)
    if check and proc.returncode != 0:
        raise AssertionError(f"chainvigil {' '.join(map(str, args))} failed ({proc.returncode}):\n{proc.stderr}")
    return proc


def start_service(root, *extra):
    return subprocess.Popen([sys.executable, "-m", "chainvigil.cli", "watch", str(root), "--headless",
                             "--every", "0.3", *map(str, extra)], stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True, cwd=PROJECT)


def launch_samplers(root, draws, pace):
    procs = simulated_chains.launch("tarn-levels", root, pace=pace, draws=draws, chains=2, fmt="csv",
                                    models=["tarns-robust"], seed=3, log=subprocess.DEVNULL)
    procs += simulated_chains.launch("tarn-levels", root, pace=pace, draws=draws, chains=2, fmt="npz",
                                     models=["tarns-plain"], seed=4, log=subprocess.DEVNULL)
    return procs


def assert_store_matches_files(root):
    """Every draw in the files is in the store exactly once, in order (checked with the draw column)."""
    store = DrawStore(root / ".chainvigil" / "draws.zarr")
    for run_dir in sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")):
        chains, _, problems = read_run_folder(run_dir)
        assert problems == []
        assert sorted(store.chains(run_dir.name)) == sorted(chains)
        for chain, (ll, params, _) in chains.items():
            ids = store.read_draw_ids(run_dir.name, chain)
            assert len(ids) == len(ll), (run_dir.name, chain)
            np.testing.assert_array_equal(ids, np.arange(1, len(ll) + 1))  # ordered, unique, none missing
            np.testing.assert_array_equal(store.read_loglik(run_dir.name, chain), ll)
            np.testing.assert_array_equal(store.read_params(run_dir.name, chain), params)


def assert_final_snapshot_equals_score(root):
    history = json.loads(cli("history", root / ".chainvigil", "--json").stdout)
    for run_dir in sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")):
        last = [h for h in history if h["run"] == run_dir.name][-1]
        scored = json.loads(cli("score", run_dir, "--json").stdout)
        assert last["draws"] == scored["draws"]
        assert last["pareto_k"]["above"] == scored["pareto_k"]["above"]
        for part, keys in (("loo", ("elpd", "se", "mcse", "p_eff")), ("waic", ("elpd", "se", "p_eff")),
                           ("pareto_k", ("max", "threshold"))):
            for key in keys:
                assert last[part][key] == pytest.approx(scored[part][key], rel=1e-9), (run_dir.name, part, key)
        assert last["mixing"]["rhat_max"] == pytest.approx(scored["mixing"]["rhat_max"], rel=1e-9)


def test_sigkill_at_random_moments_loses_and_duplicates_nothing(tmp_path):
    root = tmp_path / "root"
    root.mkdir()
    rng = random.Random(20261202)
    samplers = launch_samplers(root, draws=500, pace=25)
    kills = 0
    try:
        while kills < 10:
            service = start_service(root)
            time.sleep(rng.uniform(0.6, 2.2))
            service.send_signal(signal.SIGKILL)
            service.wait(timeout=30)
            kills += 1
        simulated_chains.wait(samplers, timeout=120)
    finally:
        simulated_chains.stop(samplers, grace=2)
    # one last clean pass: a service that runs to its end
    final = start_service(root, "--seconds", "6")
    out, _ = final.communicate(timeout=180)
    assert final.returncode == 0, out
    assert_store_matches_files(root)
    assert_final_snapshot_equals_score(root)


def test_headless_watch_with_polling_stops_cleanly_on_sigint_and_cli_reads_history(tmp_path):
    root = tmp_path / "root"
    root.mkdir()
    samplers = launch_samplers(root, draws=200, pace=100)
    service = start_service(root, "--poll")  # the polling observer, as on a network file system
    try:
        simulated_chains.wait(samplers, timeout=120)
        time.sleep(2.0)
    finally:
        simulated_chains.stop(samplers, grace=2)
        service.send_signal(signal.SIGINT)
        out, _ = service.communicate(timeout=120)
    assert service.returncode == 0, out
    assert "tarns-robust" in out and "elpd_loo" in out  # one line per snapshot
    history = json.loads(cli("history", root / ".chainvigil", "--json").stdout)
    assert history, "no snapshots recorded"
    times = [h["time"] for h in history]
    assert times == sorted(times)
    for record in history:
        assert set(record) >= {"run", "time", "draws", "draws_per_chain", "loo", "waic", "pareto_k",
                               "mixing", "verdict"}
        assert "values" not in record["pareto_k"]
        assert record["mixing"] is None or "params" not in record["mixing"]
    csv_text = cli("history", root / ".chainvigil", "--csv").stdout.splitlines()
    assert csv_text[0].startswith("run,seq,time_iso,time,") and len(csv_text) == len(history) + 1
    first = csv_text[1].split(",")
    from datetime import datetime, timezone
    stamp = datetime.strptime(first[2], "%Y-%m-%dT%H:%M:%S.%fZ").replace(tzinfo=timezone.utc)
    assert abs(stamp.timestamp() - float(first[3])) < 0.001  # the ISO column is the raw time, in UTC
    events = json.loads(cli("events", root / ".chainvigil", "--json").stdout)
    assert any(e["kind"] == "service_stopped" for e in events)
    assert_store_matches_files(root)
    assert_final_snapshot_equals_score(root)


def test_cli_errors_are_clear(tmp_path):
    missing = cli("history", tmp_path / "nowhere", "--json", check=False)
    assert missing.returncode != 0 and "nowhere" in missing.stderr
    fake = tmp_path / "history.sqlite"
    fake.write_text("not a database at all")
    bad = cli("history", fake, "--json", check=False)
    assert bad.returncode != 0 and "history.sqlite" in bad.stderr
    empty = tmp_path / "empty-run"
    empty.mkdir()
    nothing = cli("score", empty, "--json", check=False)
    assert nothing.returncode == 2 and "empty-run" in nothing.stderr
    helptext = cli("--help").stdout
    for command in ("watch", "view", "score", "history", "events", "simulate", "demo"):
        assert command in helptext


def test_target_flags_and_run_json_targets_reach_the_verdict(tmp_path):
    from chainvigil.writer import ChainWriter, write_run_info

    run = tmp_path / "flat"
    rng = np.random.default_rng(0)
    write_run_info(run, title="flat", dataset="d", n_params=1, targets={"mcse_elpd_max": 0.5})
    for chain in ("a", "b"):
        with ChainWriter(run, chain, param_names=("mu",)) as w:
            mu = rng.normal(size=(300, 1))
            w.append(-0.5 * (np.linspace(-1, 1, 5)[None, :] - mu) ** 2, mu)

    def target_of(*flags):
        checks = json.loads(cli("score", run, "--json", *flags).stdout)["verdict"]["checks"]
        return {c["name"]: c["target"] for c in checks}

    assert target_of()["mcse"] == 0.5  # from run.json
    assert target_of("--mcse-elpd-max", "0.25")["mcse"] == 0.25  # the flag wins
    assert target_of("--rhat-max", "1.05")["rhat"] == 1.05
    assert target_of()["floor"] == 200  # the stopping rule's default floor (docs/verdict.md)
    assert target_of("--min-draws-per-chain", "500")["floor"] == 500
    bad = cli("score", run, "--json", "--rhat-max", "0.9", check=False)
    assert bad.returncode == 2 and "rhat_max" in bad.stderr
