"""The service as a real process on a root full of hostile input beside a good run: FIFOs where
run.json and a chain should be, a zip bomb, a header declaring a billion observations, a run named
``__x``, symbolic link loops, a NaN in a parameter column, chains of one run with different
parameter sets, and a run.json with numbers at the edge of what a float holds.

Asserted: the process runs to its end (exit 0) and answers SIGTERM promptly, the good run has its
snapshots, every bad input has an event naming it, and a restart on the same state starts and runs
(no crash loop).
"""
from __future__ import annotations

import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
import io
import zipfile
from pathlib import Path

import numpy as np
import pytest

from chainvigil.storage.history import HistoryReader
from chainvigil.writer import ChainWriter

PROJECT = Path(__file__).resolve().parents[1]
N = 8

pytestmark = pytest.mark.slow  # real processes


def chain(run_dir, name, rng, k, fmt="csv", params=("mu",)):
    y = np.linspace(-1, 1, N)
    mu = rng.normal(0, 0.3, size=(k, 1))
    ll = -0.5 * np.log(2 * np.pi) - 0.5 * (y - mu) ** 2
    values = np.hstack([mu] * len(params)) if params else None
    with ChainWriter(run_dir, name, param_names=tuple(params), fmt=fmt) as writer:
        writer.append(ll, values)


def zip_bomb(path, gibibytes=2.5):
    """An NPZ whose loglik member inflates to ``gibibytes`` of zeros (a few MiB on disk), its zip
    entry declaring the true size."""
    rows = int(gibibytes * 2**30 // (8 * N))
    head = io.BytesIO()
    np.lib.format.write_array_header_1_0(head, {"descr": "<f8", "fortran_order": False, "shape": (rows, N)})
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=1) as zf:
        with zf.open("loglik.npy", "w", force_zip64=True) as member:
            member.write(head.getvalue())
            zeros = bytes(16 << 20)
            left = rows * 8 * N
            while left > 0:
                member.write(zeros[:min(left, len(zeros))])
                left -= len(zeros)
    assert path.stat().st_size < 64 << 20


def build_root(root: Path):
    rng = np.random.default_rng(2026)
    good = root / "good"
    good.mkdir(parents=True)
    (good / "run.json").write_text(json.dumps({"title": "the good one", "n_params": 1}))
    for c in range(2):
        chain(good, f"c{c}", rng, 300, fmt="csv")
    for c in range(2, 4):
        chain(good, f"c{c}", rng, 300, fmt="npz")
    bad = {}
    # run.json and a chain that are FIFOs
    (root / "fifo-info").mkdir()
    chain(root / "fifo-info", "c0", rng, 50)
    os.mkfifo(root / "fifo-info" / "run.json")
    bad["fifo run.json"] = "fifo-info/run.json"
    (root / "fifo-chain").mkdir()
    os.mkfifo(root / "fifo-chain" / "c0.csv")
    bad["fifo chain"] = "fifo-chain/c0.csv"
    # a zip bomb
    (root / "bomb" / "c0").mkdir(parents=True)
    zip_bomb(root / "bomb" / "c0" / "00000000.npz")
    bad["zip bomb"] = "bomb/c0/00000000.npz"
    # a header declaring a billion observations
    (root / "huge-header").mkdir()
    (root / "huge-header" / "c0.csv").write_text("draw,loglik[1000000000]\n1,-1.0\n")
    bad["huge header"] = "huge-header/c0.csv"
    # a run name zarr reserves
    (root / "__x").mkdir()
    chain(root / "__x", "c0", rng, 20)
    bad["run __x"] = "__x"
    # symbolic link loops: a run folder and a chain file
    os.symlink(root / "loop", root / "loop")
    bad["run link loop"] = "loop"
    (root / "links").mkdir()
    chain(root / "links", "c0", rng, 20)
    os.symlink(root / "links" / "c1.csv", root / "links" / "c1.csv")
    bad["chain link loop"] = "links/c1.csv"
    # one NaN in a parameter column
    (root / "nan-param").mkdir()
    for c in range(2):
        chain(root / "nan-param", f"c{c}", rng, 120)
    lines = (root / "nan-param" / "c0.csv").read_text().splitlines(keepends=True)
    fields = lines[7].split(",")
    fields[1] = "nan"
    lines[7] = ",".join(fields)
    (root / "nan-param" / "c0.csv").write_text("".join(lines))
    bad["nan param"] = "nan-param/c0.csv"
    # chains of one run with different parameter sets
    (root / "mixed").mkdir()
    chain(root / "mixed", "a", rng, 120, params=("mu",))
    chain(root / "mixed", "b", rng, 120, params=("mu", "sigma"))
    chain(root / "mixed", "c", rng, 120, fmt="npz", params=())
    bad["params differ (b)"] = "mixed/b.csv"
    bad["params differ (c)"] = "mixed/c"
    # run.json with numbers at the edge
    (root / "edge-info").mkdir()
    chain(root / "edge-info", "c0", rng, 120)
    chain(root / "edge-info", "c1", rng, 120)
    (root / "edge-info" / "run.json").write_text(
        '{"n_params": 9223372036854775808, "targets": {"mcse_elpd_max": 1e308, "rhat_max": 1e308}}')
    bad["edge run.json"] = "edge-info/run.json"
    return bad


def start(root, *extra):
    return subprocess.Popen([sys.executable, "-m", "chainvigil.cli", "watch", str(root), "--headless",
                             "--every", "0.3", *map(str, extra)], stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True, cwd=PROJECT)


def check_state(root, bad):
    with HistoryReader(root / ".chainvigil" / "history.sqlite") as history:
        events = history.events()
        snapshots = history.snapshots(run="good")
        crashed = [e for e in events if e["kind"] == "service_crashed"]
        aside = {r["name"]: r["state_reason"] for r in history.runs() if r["state"] == "set_aside"}
    assert not crashed, crashed
    assert snapshots and snapshots[-1]["draws"] == 1200
    for what, part in bad.items():
        about = [e for e in events if part in (e["file"] or "") or part in e["message"]]
        assert about, f"no event about the {what} ({part})"
    assert not aside, aside
    return events


def test_hostile_root_runs_to_its_end_and_restarts(tmp_path):
    root = tmp_path / "root"
    bad = build_root(root)
    proc = start(root, "--seconds", "10")
    out, _ = proc.communicate(timeout=120)
    assert proc.returncode == 0, out
    events = check_state(root, bad)
    kinds = {e["kind"] for e in events}
    assert {"params_differ", "not_mixed"} <= kinds, kinds
    again = start(root, "--seconds", "4")  # the same state: starts and runs, no crash loop
    out, _ = again.communicate(timeout=120)
    assert again.returncode == 0, out
    check_state(root, bad)


def test_hostile_root_answers_sigterm_promptly(tmp_path):
    root = tmp_path / "root"
    bad = build_root(root)
    proc = start(root)
    deadline = time.time() + 60
    history = root / ".chainvigil" / "history.sqlite"
    while time.time() < deadline:  # mid-run: once the good run has a snapshot
        try:
            with HistoryReader(history) as h:
                if h.snapshots(run="good"):
                    break
        except (ValueError, sqlite3.Error, OSError):
            pass  # not created yet, or created this instant
        time.sleep(0.2)
    proc.send_signal(signal.SIGTERM)
    sent = time.time()
    out, _ = proc.communicate(timeout=60)
    assert proc.returncode == 0, out
    assert time.time() - sent < 15, "SIGTERM took too long"
    check_state(root, bad)
