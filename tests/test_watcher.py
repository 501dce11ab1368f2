"""The folder watcher with the real watchdog observers: inotify and polling (docs/architecture.md)."""

from __future__ import annotations

import os
import threading
import time

import numpy as np
import pytest

from chainvigil.watcher import FolderWatcher
from chainvigil.writer import ChainWriter

MODES = [pytest.param(False, id="inotify"), pytest.param(True, id="polling")]
# The debounce and max-delay rules, and what is ignored, act after the observer, alike for both; the
# fast run checks them on inotify (the polling observer's events are checked fast by the other polling
# cases) and the full suite on both.
TIMING_MODES = [pytest.param(False, id="inotify"), pytest.param(True, id="polling", marks=pytest.mark.slow)]
# Pause after start() before the first write.  Both observers install their watches (inotify) or
# take their first snapshot (polling) inside start() (watchdog's emitters do it in on_thread_start,
# before their thread runs), so a write right after start() is seen; the pause only lets the threads
# get going.  Where a test asserts that nothing was delivered, it waits longer than a delivery takes.
STARTED = 0.05


class Recorder:
    def __init__(self):
        self.calls: list[tuple[float, set[str]]] = []
        self.threads: set[int] = set()
        self.lock = threading.Lock()

    def __call__(self, runs: set[str]) -> None:
        with self.lock:
            self.calls.append((time.monotonic(), set(runs)))
            self.threads.add(threading.get_ident())

    def runs(self) -> set[str]:
        with self.lock:
            return set().union(*(r for _t, r in self.calls)) if self.calls else set()

    def wait_for(self, run: str, timeout: float = 5.0) -> bool:
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if run in self.runs():
                return True
            time.sleep(0.02)
        return False


def watcher(root, rec, poll, **kw):
    kw.setdefault("debounce", 0.15)
    kw.setdefault("max_delay", 0.8)
    return FolderWatcher(root, rec, poll=poll, poll_interval=0.1, **kw)


@pytest.mark.parametrize("poll", MODES)
def test_new_chunk_by_rename_in_a_new_run_folder(tmp_path, poll):
    rec = Recorder()
    with watcher(tmp_path, rec, poll) as w:
        time.sleep(STARTED)
        with ChainWriter(tmp_path / "run_new", "c1") as cw:   # folder created after the start
            cw.append(np.zeros((4, 3)))
        assert rec.wait_for("run_new")
        assert "run_new" in w.watched_runs
        # a second chunk, after the folder is watched, is seen too
        n_before = len(rec.calls)
        time.sleep(0.3)
        cw = ChainWriter(tmp_path / "run_new", "c1")
        cw.append(np.zeros((4, 3)))
        end = time.monotonic() + 5
        while len(rec.calls) == n_before and time.monotonic() < end:
            time.sleep(0.02)
        assert len(rec.calls) > n_before and rec.calls[-1][1] == {"run_new"}


@pytest.mark.parametrize("poll", MODES)
def test_csv_append_in_an_existing_run(tmp_path, poll):
    with ChainWriter(tmp_path / "run_a", "c1", fmt="csv") as cw:
        cw.append(np.zeros((2, 2)))
    (tmp_path / "run_b").mkdir()
    rec = Recorder()
    with watcher(tmp_path, rec, poll):
        time.sleep(0.3)
        assert rec.calls == []                            # nothing happened yet
        with ChainWriter(tmp_path / "run_a", "c1", fmt="csv") as cw:
            cw.append(np.ones((1, 2)))
        assert rec.wait_for("run_a")
    assert rec.runs() == {"run_a"}


@pytest.mark.parametrize("poll", TIMING_MODES)
def test_a_burst_of_writes_is_debounced_into_few_calls(tmp_path, poll):
    for run in ("r1", "r2"):
        (tmp_path / run).mkdir()
    rec = Recorder()
    with watcher(tmp_path, rec, poll, debounce=0.3, max_delay=2.0):
        time.sleep(STARTED)
        writers = [ChainWriter(tmp_path / "r1", "c", fmt="csv"), ChainWriter(tmp_path / "r2", "c")]
        for i in range(50):
            writers[i % 2].append(np.full((1, 3), float(i)))
            time.sleep(0.005)
        for cw in writers:
            cw.close()
        assert rec.wait_for("r1") and rec.wait_for("r2")
        time.sleep(0.6)
    assert 1 <= len(rec.calls) <= 4, rec.calls
    assert rec.runs() == {"r1", "r2"}
    assert len(rec.threads) == 1


@pytest.mark.parametrize("poll", TIMING_MODES)
def test_a_continuous_stream_is_delivered_at_least_every_max_delay(tmp_path, poll):
    (tmp_path / "busy").mkdir()
    rec = Recorder()
    # debounce alone would deliver nothing while the stream lasts (never 0.2 s quiet); max_delay
    # 0.3 s gives about five deliveries in 1.5 s, at least three asked for
    with watcher(tmp_path, rec, poll, debounce=0.2, max_delay=0.3):
        time.sleep(STARTED)
        t0 = time.monotonic()
        with ChainWriter(tmp_path / "busy", "c", fmt="csv") as cw:
            while time.monotonic() - t0 < 1.5:               # an event every 50 ms: never quiet
                cw.append(np.zeros((1, 2)))
                time.sleep(0.05)
        during = [t for t, _r in rec.calls if t < t0 + 1.5]
    assert len(during) >= 3, [round(t - t0, 2) for t, _r in rec.calls]


@pytest.mark.parametrize("poll", TIMING_MODES)
def test_state_folder_hidden_files_and_root_files_are_ignored(tmp_path, poll):
    (tmp_path / "run1").mkdir()
    state = tmp_path / "state"
    state.mkdir()
    rec = Recorder()
    with watcher(tmp_path, rec, poll, ignore=[state]):
        time.sleep(STARTED)
        for folder in (tmp_path / ".chainvigil", state / "store"):
            folder.mkdir()
            for i in range(5):
                (folder / f"chunk{i}").write_bytes(b"x" * 10)
        (tmp_path / "run1" / ".00000000.npz.tmp").write_bytes(b"x")     # temp name, never renamed
        (tmp_path / "run1" / "ENOUGH.json").write_text("{}")           # the service's own signal
        (tmp_path / "notes.txt").write_text("x")
        time.sleep(0.6)  # a delivery takes debounce (0.15 s) plus a poll (0.1 s)
        assert rec.calls == []
        (tmp_path / "run1" / "c.csv").write_text("loglik[1]\n-1\n")   # and it still sees real input
        assert rec.wait_for("run1")
    assert rec.runs() == {"run1"}


def test_reads_do_not_wake_the_watcher(tmp_path):
    with ChainWriter(tmp_path / "run1", "c", fmt="csv") as cw:
        cw.append(np.zeros((2, 2)))
    rec = Recorder()
    with watcher(tmp_path, rec, False):
        time.sleep(STARTED)
        for _ in range(5):
            (tmp_path / "run1" / "c.csv").read_bytes()
        time.sleep(0.6)
        assert rec.calls == []
        # Positive control: the same watcher does wake for a write to the same file.
        with open(tmp_path / "run1" / "c.csv", "a") as f:
            f.write("0,0\n")
        assert rec.wait_for("run1")
    assert rec.runs() == {"run1"}


def test_callback_errors_are_kept_and_the_watcher_goes_on(tmp_path):
    (tmp_path / "run1").mkdir()
    seen = []

    def on_change(runs):
        seen.append(runs)
        if len(seen) == 1:
            raise RuntimeError("first call fails")

    w = watcher(tmp_path, on_change, False, debounce=0.05, max_delay=0.2)
    with w:
        time.sleep(STARTED)
        (tmp_path / "run1" / "a.csv").write_text("x\n")
        end = time.monotonic() + 5
        while not seen and time.monotonic() < end:
            time.sleep(0.02)
        time.sleep(0.3)
        (tmp_path / "run1" / "b.csv").write_text("x\n")
        while len(seen) < 2 and time.monotonic() < end:
            time.sleep(0.02)
    assert len(seen) >= 2 and len(w.errors) == 1 and "first call fails" in str(w.errors[0])


def test_stop_joins_the_threads_and_request_delivers(tmp_path):
    rec = Recorder()
    w = watcher(tmp_path, rec, False, debounce=0.05)
    w.start()
    w.request({"run9"})
    assert rec.wait_for("run9")
    w.stop()
    assert not w._thread.is_alive() and not w._observer.is_alive()


def test_missing_root_and_bad_timing(tmp_path):
    with pytest.raises(FileNotFoundError):
        FolderWatcher(tmp_path / "nope", print).start()
    with pytest.raises(ValueError):
        FolderWatcher(tmp_path, print, debounce=2.0, max_delay=1.0)
