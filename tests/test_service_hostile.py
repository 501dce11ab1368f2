"""The service against hostile input: names that look like shell code, a run folder swapped for a
symlink, control characters in names, a run whose processing fails, a loop crash, a lost state folder.

Real folders, a real history and draw store, real subprocesses for ``--on-enough``.
"""
from __future__ import annotations

import json
import os
import shlex
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from chainvigil.reports import escape_text
from chainvigil.service import Service
from chainvigil.writer import write_run_info
from test_service import events_of, write_chain

# Writes every CHAINVIGIL_* variable it receives to a file named after its process id.
RECORDER = ("import json, os; "
            "env = {k: v for k, v in os.environ.items() if k.startswith('CHAINVIGIL_')}; "
            "open(os.path.join(os.environ['CHAINVIGIL_STATE'], 'got-%d.json' % os.getpid()), 'w')"
            ".write(json.dumps(env))")


def _enough_run(run: Path, rng):
    """Four iid chains: every target is met once the trail spans a fifth of the draws."""
    write_run_info(run, title="t", n_params=1)
    for c in range(4):
        write_chain(run, f"c{c}", rng, 400)


def _grow(run: Path, rng):
    for c in range(4):
        write_chain(run, f"c{c}", rng, 100)


def _wait_for(predicate, seconds=10.0):
    deadline = time.time() + seconds
    while time.time() < deadline:
        if predicate():
            return True
        time.sleep(0.05)
    return predicate()


def test_on_enough_gets_names_in_environment_and_runs_nothing_else(tmp_path):
    root = tmp_path / "root"
    root.mkdir()
    hostile = ["x{folder};touch P;#", "it's \"quoted\" $(touch Q)"]
    rng = np.random.default_rng(11)
    for name in hostile:
        _enough_run(root / name, rng)
    command = f"{shlex.quote(sys.executable)} -c {shlex.quote(RECORDER)}"
    service = Service(root, every=0.0, on_enough=command)
    service.cycle(force=True)
    for name in hostile:
        _grow(root / name, rng)
    service.cycle(force=True)
    state = service.state_dir
    assert _wait_for(lambda: len(list(state.glob("got-*.json"))) == 2), list(state.iterdir())
    time.sleep(0.3)  # anything an injected command would have started has had time to run
    received = [json.loads(p.read_text()) for p in state.glob("got-*.json")]
    assert sorted(r["CHAINVIGIL_RUN"] for r in received) == sorted(hostile)
    for r in received:
        assert r["CHAINVIGIL_FOLDER"] == str(root / r["CHAINVIGIL_RUN"])
        assert r["CHAINVIGIL_DRAWS"] == "2000" and r["CHAINVIGIL_DRAWS_PER_CHAIN"] == "500"
        assert r["CHAINVIGIL_ENOUGH_FILE"] == str(root / r["CHAINVIGIL_RUN"] / "ENOUGH.json")
    for where in (state, root, tmp_path, Path.cwd(), *[root / n for n in hostile]):
        assert not (where / "P").exists() and not (where / "Q").exists(), where
    service.close()


def test_on_enough_bad_quoting_is_refused_at_start(tmp_path):
    (tmp_path / "root").mkdir()
    with pytest.raises(ValueError, match="on-enough"):
        Service(tmp_path / "root", on_enough="echo 'unclosed")


def test_signal_not_written_through_a_symlinked_run_folder(tmp_path):
    root = tmp_path / "root"
    root.mkdir()
    outside = tmp_path / "outside"
    outside.mkdir()
    rng = np.random.default_rng(12)
    run = root / "swapped"
    control = root / "control"  # positive control beside it: stays a real folder, gets its signal
    for folder in (run, control):
        _enough_run(folder, rng)
    service = Service(root, every=0.0)
    service.cycle(force=True)
    assert not (run / "ENOUGH.json").exists() and not (control / "ENOUGH.json").exists()
    for folder in (run, control):
        _grow(folder, rng)
    # Now the scored draws are in; swap the run folder for a symlink to a folder outside the root,
    # after the ingest of the pass (the service reads nothing new from it) and before the signal.
    import chainvigil.service as service_module

    real_write = service_module.write_signal_inside

    def swap_then_write(root_, folder, *args, **kwargs):
        if Path(folder).name == "swapped":
            moved = tmp_path / "moved-away"
            os.rename(folder, moved)
            for item in moved.iterdir():
                os.rename(item, outside / item.name)
            os.symlink(outside, folder)
        return real_write(root_, folder, *args, **kwargs)

    service_module.write_signal_inside = swap_then_write
    try:
        service.cycle(force=True)
    finally:
        service_module.write_signal_inside = real_write
    assert (control / "ENOUGH.json").is_file()
    assert not (outside / "ENOUGH.json").exists()
    assert not any(p.name.startswith(".ENOUGH") for p in outside.iterdir())
    refused = events_of(service, "signal_refused")
    assert refused and refused[0]["run"] == "swapped" and "no longer a folder" in refused[0]["message"]
    service.close()


def test_headless_lines_escape_control_characters(tmp_path):
    assert escape_text("a\x1b[2Jb\nc\rd\x07\u202e") == "a\\x1b[2Jb\\nc\\rd\\x07\\u202e"
    assert escape_text("élan ünd π") == "élan ünd π"  # printable text stays
    root = tmp_path / "root"
    root.mkdir()
    name = "evil\x1b[31mred\nFAKE LINE"
    rng = np.random.default_rng(13)
    for c in range(2):
        write_chain(root / name, f"c{c}", rng, 100)
    lines = []
    service = Service(root, every=0.0, report=lines.append)
    service.cycle(force=True)
    assert lines, "no headless line written"
    assert any("evil\\x1b[31mred\\nFAKE LINE" in line for line in lines)
    for line in lines:
        assert "\x1b" not in line and "\n" not in line
    service.close()


def test_a_failing_run_is_set_aside_and_the_others_go_on(tmp_path):
    root = tmp_path / "root"
    root.mkdir()
    rng = np.random.default_rng(14)
    for run in ("good", "bad"):
        for c in range(2):
            write_chain(root / run, f"c{c}", rng, 100)
    service = Service(root, every=0.0)
    service.cycle(force=True)
    bad = service.runs["bad"]
    broken_scorer = bad.scorer

    class Exploding:
        """Stands in for the scorer of one run only: its scores raise an unexpected error."""

        def __getattr__(self, name):
            return getattr(broken_scorer, name)

        def add(self, chain, block):
            raise RuntimeError("boom while adding")

    bad.scorer = Exploding()
    for run in ("good", "bad"):
        write_chain(root / run, "c0", rng, 50)
    service.cycle(force=True)
    row = service.history.run("bad")
    assert row["state"] == "set_aside" and "boom while adding" in row["state_reason"]
    assert str(root / "bad" / "c0") in row["state_reason"]  # names the file being read
    errors = events_of(service, "run_set_aside")
    assert errors and errors[0]["level"] == "error" and errors[0]["run"] == "bad"
    assert service.history.latest_snapshot("good")["draws"] == 250  # the other run went on
    assert service.history.run("good")["state"] != "set_aside"
    # Restored to the commit log: nothing half-read is counted; the scorer was rebuilt.
    assert service.store.length("bad", "c0") == 100
    # Unchanged folder: left alone.  Changed folder: tried again, and it catches up.
    service.cycle(force=True)
    assert service.history.run("bad")["state"] == "set_aside"
    write_chain(root / "bad", "c1", rng, 10)
    service.cycle(force=True)
    assert service.history.run("bad")["state"] != "set_aside"
    assert service.store.length("bad", "c0") == 150 and service.store.length("bad", "c1") == 110
    assert service.history.latest_snapshot("bad")["draws"] == 260
    assert any(e["kind"] == "run_retried" for e in events_of(service))
    service.close()


def test_a_crash_of_the_loop_is_recorded_as_such(tmp_path):
    root = tmp_path / "root"
    root.mkdir()
    service = Service(root, every=0.1)

    def crash(*args, **kwargs):
        raise ZeroDivisionError("loop bug")

    service.compare = crash
    write_chain(root / "r", "c0", np.random.default_rng(15), 20)
    with pytest.raises(ZeroDivisionError):
        service.run(duration=5)
    kinds = [e["kind"] for e in events_of(service)]
    assert "service_crashed" in kinds and "service_stopped" not in kinds
    crashed = events_of(service, "service_crashed")[0]
    assert crashed["level"] == "error" and "ZeroDivisionError: loop bug" in crashed["message"]
    assert "Traceback" in crashed["message"]


def test_a_clean_stop_is_recorded_as_stopped(tmp_path):
    """Positive control for the crash test: the same loop without the bug ends as service_stopped."""
    root = tmp_path / "root"
    root.mkdir()
    service = Service(root, every=0.1)
    service.run(duration=0.5)
    kinds = [e["kind"] for e in events_of(service)]
    assert "service_stopped" in kinds and "service_crashed" not in kinds


def test_a_deleted_state_folder_is_reported_and_started_afresh(tmp_path):
    import shutil

    root = tmp_path / "root"
    root.mkdir()
    rng = np.random.default_rng(16)
    write_chain(root / "r", "c0", rng, 40)
    lines = []
    service = Service(root, every=0.0, report=lines.append)
    service.cycle(force=True)
    shutil.rmtree(service.state_dir)
    write_chain(root / "r", "c0", rng, 10)
    service._retry_delay = 0.0
    assert service._guarded_cycle(force=True) is False  # the pass fails, is reported, state reopened
    assert any("state folder" in line and "retrying" in line for line in lines), lines
    assert (service.state_dir / "history.sqlite").is_file()
    assert [e["kind"] for e in events_of(service, "state_reopened")] == ["state_reopened"]
    assert service._guarded_cycle(force=True) is True  # the retried pass runs on the new folder
    assert service.store.length("r", "c0") == 50  # every draw of the files, read again once
    assert service.history.latest_snapshot("r")["draws"] == 50
    service.close()


def test_history_locked_past_the_busy_timeout_is_reported_and_retried(tmp_path):
    import sqlite3

    root = tmp_path / "root"
    root.mkdir()
    rng = np.random.default_rng(17)
    write_chain(root / "r", "c0", rng, 40)
    lines = []
    service = Service(root, every=0.0, report=lines.append)
    service._retry_delay = 0.0
    service.history.conn.execute("PRAGMA busy_timeout = 200")  # instead of waiting 30 s
    other = sqlite3.connect(service.state_dir / "history.sqlite", isolation_level=None)
    other.execute("BEGIN EXCLUSIVE")  # another process holds the write lock
    try:
        assert service._guarded_cycle(force=True) is False
    finally:
        other.execute("ROLLBACK")
        other.close()
    assert any("locked" in line and "retrying" in line for line in lines), lines
    assert service._guarded_cycle(force=True) is True  # the lock is gone: the pass goes through
    assert service.store.length("r", "c0") == 40  # read once, not twice, after the failed pass
    assert service.history.committed("r", "c0")["draws"] == 40
    assert service.history.latest_snapshot("r")["draws"] == 40
    service.close()
