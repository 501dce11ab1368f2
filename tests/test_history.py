"""The SQLite history on real files: every table round trips, thinning, readers in another process."""

import json
import os
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from chainvigil.storage.history import SCHEMA_VERSION, History, HistoryReader, HistoryWriter

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture
def hist(tmp_path):
    h = History(tmp_path / "state" / "history.db")
    yield h
    h.close()


# ---------------------------------------------------------------- file, version, modes

def test_new_file_is_wal_with_a_schema_version(tmp_path):
    path = tmp_path / "h.db"
    History(path).close()
    con = sqlite3.connect(path)  # any SQLite tool sees the layout
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert con.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0] == \
        str(SCHEMA_VERSION)
    tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"meta", "runs", "chains", "manifest", "snapshots", "mixing", "pointwise_latest",
            "pointwise_history", "comparisons", "events"} <= tables
    con.close()
    assert History(path, readonly=True).schema_version() == SCHEMA_VERSION


def test_newer_schema_foreign_file_and_missing_file_are_refused(tmp_path):
    path = tmp_path / "h.db"
    History(path).close()
    con = sqlite3.connect(path)
    con.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION + 1),))
    con.commit()
    con.close()
    for readonly in (False, True):
        with pytest.raises(ValueError, match="newer"):
            History(path, readonly=readonly)
    other = tmp_path / "other.db"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE stuff (x)")
    con.commit()
    con.close()
    with pytest.raises(ValueError, match="not a chainvigil history"):
        History(other)
    with pytest.raises(FileNotFoundError, match="nope.db"):
        History(tmp_path / "nope.db", readonly=True)


def test_readonly_refuses_writes(tmp_path):
    History(tmp_path / "h.db").close()
    ro = History(tmp_path / "h.db", readonly=True)
    assert isinstance(ro, HistoryReader) and not isinstance(ro, HistoryWriter)
    # The reader has no write methods at all, and its connection itself is read-only.
    for write in ("add_event", "upsert_run", "upsert_chain", "add_snapshot", "commit_ingest",
                  "add_comparison", "set_run_state"):
        assert not hasattr(ro, write), write
        assert hasattr(HistoryWriter, write), write  # positive control: the writer has it
    with pytest.raises(sqlite3.OperationalError, match="readonly"):
        ro.conn.execute("INSERT INTO events (level, kind, message) VALUES ('info', 'x', 'y')")


# ---------------------------------------------------------------- runs and chains

def test_runs_round_trip_and_partial_updates(hist):
    hist.upsert_run("m1", folder="/data/m1", title="Model one", dataset="wells", n_obs=3,
                    n_params=2, point_loglik=-12.5, labels=["a", "b", "c"],
                    targets={"rhat": 1.01, "mcse": 0.1})
    r = hist.run("m1")
    assert r["labels"] == ["a", "b", "c"] and r["targets"] == {"rhat": 1.01, "mcse": 0.1}
    assert r["state"] == "gathering" and r["first_seen"] is not None and r["enough_at"] is None
    first_seen = r["first_seen"]
    hist.upsert_run("m1", title="Renamed")
    r = hist.run("m1")
    assert r["title"] == "Renamed" and r["dataset"] == "wells" and r["n_obs"] == 3
    assert r["first_seen"] == first_seen
    hist.set_run_state("m1", "enough", enough_at=1234.5)
    assert (hist.run("m1")["state"], hist.run("m1")["enough_at"]) == ("enough", 1234.5)
    hist.upsert_run("a0")
    assert [x["name"] for x in hist.runs()] == ["a0", "m1"]
    assert hist.run("missing") is None
    with pytest.raises(ValueError, match="colour"):
        hist.upsert_run("m1", colour="red")
    with pytest.raises(ValueError, match="'done'"):
        hist.set_run_state("m1", "done")


def test_chains_manifest_and_committed(hist):
    hist.upsert_chain("m1", "c2", kind="npz", param_names=["mu", "tau"])
    hist.upsert_chain("m1", "c1", kind="csv", param_names=["mu"], header="draw,mu,loglik[1]")
    assert [c["chain"] for c in hist.chains("m1")] == ["c1", "c2"]
    c1 = hist.chains("m1")[0]
    assert c1["param_names"] == ["mu"] and c1["draws"] == 0 and c1["header"].startswith("draw")
    hist.commit_ingest("m1", "c1", "c1.csv", 100, 100, offset=5000)
    hist.commit_ingest("m1", "c1", "c1.csv", 50, 150, offset=7600)
    hist.commit_ingest("m1", "c2", "c2/00000000.npz", 200, 200, chunk="00000000.npz")
    hist.commit_ingest("m1", "c2", "c2/00000001.npz", 200, 400, chunk="00000001.npz")
    nothing = {"warmup": 0, "position": None, "last_draw": None}
    assert hist.committed("m1", "c1") == {"draws": 150, "offsets": {"c1.csv": 7600},
                                          "chunks": set(), **nothing}
    assert hist.committed("m1", "c2") == {"draws": 400, "offsets": {},
                                          "chunks": {"00000000.npz", "00000001.npz"}, **nothing}
    assert hist.committed("m1", "none") == {"draws": 0, "offsets": {}, "chunks": set(), **nothing}
    assert hist.chains("m1")[0]["param_names"] == ["mu"]  # the commit left the other fields alone
    rows = hist.manifest("m1", "c1")
    assert [(r["draws_added"], r["draws_after"], r["offset"]) for r in rows] == \
        [(100, 100, 5000), (50, 150, 7600)]
    with pytest.raises(ValueError, match="inconsistent"):
        hist.commit_ingest("m1", "c1", "c1.csv", 10, 5, offset=1)
    with pytest.raises(ValueError, match="'parquet'"):
        hist.upsert_chain("m1", "c3", kind="parquet")


# ---------------------------------------------------------------- snapshots, mixing, pointwise

def _row(i, **extra):
    return {"time": 1000.0 + i, "chains": 4, "draws": 400 * i, "draws_per_chain": 100 * i,
            "draw_rate": np.float64(2.5), "r_eff_mean": 0.8, "loo_elpd": -100.0 + i,
            "loo_se": 5.0, "loo_mcse": 0.2 / i, "loo_p_eff": 3.1, "waic_elpd": -99.0,
            "waic_se": 5.0, "waic_p_eff": 3.0, "dic_elpd": -98.0, "dic_p_eff": 2.9,
            "aic_elpd": None, "aic_p_eff": None, "k_max": 0.4, "k_threshold": 0.7,
            "k_above": np.int64(0), "rhat_max": 1.02, "ess_bulk_min": 350.0,
            "ess_tail_min": 300.0, "enough": np.bool_(False),
            "verdict": {"enough": False, "checks": [
                {"name": "mixing", "ok": False, "value": 1.02, "target": 1.01,
                 "more_draws": 400, "minutes": float("inf"), "note": None}]}, **extra}


def _pw(n, value):
    return {"elpd_loo": np.full(n, -value), "elpd_waic": np.full(n, -value - 0.5),
            "k_hat": np.linspace(0, value / 100, n)}


def test_snapshot_round_trip_and_seq_per_run(hist):
    hist.upsert_run("m1", labels=["x", "y", "z"])
    a1 = hist.add_snapshot("m1", _row(1), [{"param": "mu", "mean": 0.1, "mcse": 0.01,
                                            "rhat": 1.001, "ess_bulk": 900, "ess_tail": 800},
                                           {"param": "tau", "mean": 2.0, "mcse": 0.05,
                                            "rhat": 1.02, "ess_bulk": 350, "ess_tail": 300}],
                           _pw(3, 1.0))
    b1 = hist.add_snapshot("m2", _row(1), {"sigma": {"mean": 1.0, "rhat": 1.0}})
    a2 = hist.add_snapshot("m1", _row(2, enough=True))
    s = hist.snapshot(a1)
    assert (s["run"], s["seq"], s["draws"], s["enough"], s["k_above"]) == ("m1", 1, 400, 0, 0)
    assert s["draw_rate"] == 2.5 and s["aic_elpd"] is None
    assert s["verdict"]["checks"][0]["name"] == "mixing"
    assert s["verdict"]["checks"][0]["minutes"] is None  # non-finite numbers are stored as null
    assert hist.snapshot(a2)["seq"] == 2 and hist.snapshot(b1)["seq"] == 1
    assert hist.snapshot(a2)["enough"] == 1
    assert hist.latest_snapshot("m1")["id"] == a2 and hist.latest_snapshot("none") is None
    assert [x["id"] for x in hist.snapshots()] == [a1, b1, a2]
    assert [x["id"] for x in hist.snapshots("m1")] == [a1, a2]
    assert [x["id"] for x in hist.snapshots(after_id=a1, limit=1)] == [b1]
    assert hist.run("m1")["updated"] == 1002.0  # the time of the latest snapshot
    assert hist.run("m2")["state"] == "gathering"  # a snapshot of an unknown run creates it
    assert [(m["param"], m["rhat"]) for m in hist.mixing(a1)] == [("mu", 1.001), ("tau", 1.02)]
    assert hist.mixing(b1)[0]["param"] == "sigma" and hist.mixing(a2) == []
    pw = hist.pointwise("m1")
    assert [(p["obs"], p["label"], p["elpd_loo"], p["snapshot_id"]) for p in pw] == \
        [(0, "x", -1.0, a1), (1, "y", -1.0, a1), (2, "z", -1.0, a1)]
    assert pw[0]["elpd_waic"] == -1.5
    with pytest.raises(ValueError, match="loo_elpdd"):
        hist.add_snapshot("m1", {"loo_elpdd": 1.0})
    with pytest.raises(ValueError, match="'k_hat'"):
        hist.add_snapshot("m1", {}, pointwise={"elpd_loo": [1], "elpd_waic": [1]})
    with pytest.raises(ValueError, match="one length"):
        hist.add_snapshot("m1", {}, pointwise={"elpd_loo": [1, 2], "elpd_waic": [1], "k_hat": [1]})
    assert hist.latest_snapshot("m1")["id"] == a2  # the refused snapshots left nothing behind


def test_pointwise_history_is_thinned_and_looked_up_at_or_before(hist):
    n = 4
    ids = {}
    for seq in range(1, 13):
        ids[seq] = hist.add_snapshot("m1", _row(seq), pointwise=_pw(n, float(seq)),
                                     keep_pointwise=(seq == 7))
    con = sqlite3.connect(hist.path)
    kept = [r[0] for r in con.execute(
        "SELECT DISTINCT s.seq FROM pointwise_history h JOIN snapshots s ON s.id = h.snapshot_id "
        "ORDER BY s.seq")]
    con.close()
    # geometric in draws per chain (100 x seq): the first, each kept one >= 1.25 x the previous kept,
    # the pinned one (7) and the latest
    assert kept == [1, 2, 3, 4, 5, 7, 9, 12]

    def source(seq):
        rows = hist.pointwise("m1", ids[seq])
        assert len(rows) == n and [r["obs"] for r in rows] == list(range(n))
        assert len({r["snapshot_id"] for r in rows}) == 1
        return rows[0]["snapshot_id"], -rows[0]["elpd_loo"]

    assert source(3) == (ids[3], 3.0)
    assert source(6) == (ids[5], 5.0)
    assert source(8) == (ids[7], 7.0)
    assert source(9) == (ids[9], 9.0)
    assert source(11) == (ids[9], 9.0)
    assert source(12) == (ids[12], 12.0)  # the latest comes from pointwise_latest
    assert hist.pointwise("m1", ids[9])[0]["elpd_waic"] is None  # history keeps loo and k-hat only
    assert hist.pointwise("m1", ids[12])[0]["elpd_waic"] == -12.5
    np.testing.assert_allclose([r["k_hat"] for r in hist.pointwise("m1", ids[4])],
                               np.linspace(0, 0.04, n))
    assert hist.pointwise("other") == [] and hist.pointwise("m1", 0) == []


def test_pointwise_for_twenty_thousand_observations(hist):
    n = 20_000
    rng = np.random.default_rng(5)
    pw = {"elpd_loo": rng.normal(size=n), "elpd_waic": rng.normal(size=n),
          "k_hat": rng.uniform(size=n), "labels": [f"obs{i}" for i in range(n)]}
    sid = hist.add_snapshot("big", _row(1), pointwise=pw)
    rows = hist.pointwise("big")
    assert len(rows) == n and rows[-1]["label"] == "obs19999"
    np.testing.assert_array_equal([r["k_hat"] for r in rows], pw["k_hat"])
    sid2 = hist.add_snapshot("big", _row(2), pointwise={**pw, "k_hat": pw["k_hat"] / 2})
    assert len(hist.pointwise("big")) == n  # latest replaced, not duplicated
    np.testing.assert_array_equal([r["k_hat"] for r in hist.pointwise("big", sid)], pw["k_hat"])
    assert hist.pointwise("big", sid2)[0]["snapshot_id"] == sid2


# ---------------------------------------------------------------- comparisons and events

def _cmp(runs, deltas):
    return [{"run": r, "elpd": -100 + d, "delta": d, "se_delta": 1.0, "mcse_delta": 0.1,
             "weight": w, "caution": abs(d) < 4, "may_flip": False}
            for r, d, w in zip(runs, deltas, [0.7, 0.3, 0.0])]


def test_comparisons_latest_round_at_or_before_time(hist):
    r1 = hist.add_comparison("wells", _cmp(["a", "b"], [0.0, -3.0]), time=100.0)
    r2 = hist.add_comparison("radon", _cmp(["x", "y", "z"], [0.0, -1.0, -9.0]), time=150.0)
    r3 = hist.add_comparison("wells", _cmp(["b", "a"], [0.0, -0.5]), time=200.0)
    assert (r1, r2, r3) == (1, 2, 3)
    now = hist.comparisons()
    assert [(c["dataset"], c["run"], c["rank"], c["round"]) for c in now] == [
        ("radon", "x", 1, 2), ("radon", "y", 2, 2), ("radon", "z", 3, 2),
        ("wells", "b", 1, 3), ("wells", "a", 2, 3)]
    assert [c["caution"] for c in now] == [1, 1, 0, 1, 1]
    assert [c["run"] for c in hist.comparisons("wells", at_time=199.0)] == ["a", "b"]
    assert [c["round"] for c in hist.comparisons(at_time=160.0)] == [2, 2, 2, 1, 1]
    assert hist.comparisons(at_time=120.0)[0]["dataset"] == "wells"
    assert hist.comparisons(at_time=50.0) == [] and hist.comparisons("none") == []
    with pytest.raises(ValueError, match="wells"):
        hist.add_comparison("wells", [{"run": "a", "score": 1.0}])


def test_events_are_ordered_and_filtered(hist):
    ids = [hist.add_event("info", "run_appeared", "new run", run="m1"),
           hist.add_event("warning", "bad_values", "NaN in row 3", run="m1", file="m1/c1.csv"),
           hist.add_event("error", "rejected_input", "no loglik columns", run="m2",
                          file=Path("m2/c1.csv")),
           hist.add_event("info", "rebuild", "tail buffer rebuilt")]
    ev = hist.events()
    assert [e["id"] for e in ev] == ids == sorted(ids)
    assert [e["time"] for e in ev] == sorted(e["time"] for e in ev)
    assert [e["kind"] for e in hist.events(after_id=ids[1])] == ["rejected_input", "rebuild"]
    assert [e["id"] for e in hist.events(run="m1")] == ids[:2]
    assert ev[2]["file"] == "m2/c1.csv" and ev[3]["run"] is None
    with pytest.raises(ValueError, match="'fatal'"):
        hist.add_event("fatal", "x", "y")


def test_change_marker_moves_on_every_write(hist):
    ro = History(hist.path, readonly=True)
    seen_w, seen_r = {hist.change_marker()}, {ro.change_marker()}
    assert hist.change_marker() in seen_w and ro.change_marker() in seen_r  # stable when idle
    writes = [lambda: hist.upsert_run("m1"), lambda: hist.upsert_chain("m1", "c1", kind="csv"),
              lambda: hist.commit_ingest("m1", "c1", "c1.csv", 1, 1, offset=10),
              lambda: hist.add_snapshot("m1", _row(1)),
              lambda: hist.add_comparison("d", _cmp(["m1"], [0.0])),
              lambda: hist.add_event("info", "x", "y"),
              lambda: hist.set_run_state("m1", "needs_a_look")]
    for write in writes:
        write()
        w, r = hist.change_marker(), ro.change_marker()
        assert w not in seen_w and r not in seen_r
        seen_w.add(w)
        seen_r.add(r)
    ro.close()


# ---------------------------------------------------------------- a writer in another process

WRITER = textwrap.dedent("""
    import sys
    from chainvigil.storage.history import History
    h = History(sys.argv[1])
    h.upsert_run("m1", title="from the writer")
    h.add_event("info", "run_appeared", "first")
    print("committed", flush=True)
    sys.stdin.readline()
    h.conn.execute("BEGIN IMMEDIATE")       # hold the write lock with an uncommitted row
    h.conn.execute("INSERT INTO events (time, level, kind, message) "
                   "VALUES (0, 'info', 'x', 'uncommitted')")
    print("holding", flush=True)
    sys.stdin.readline()
    h.conn.execute("COMMIT")
    h.add_event("warning", "bad_values", "second")
    print("done", flush=True)
    sys.stdin.readline()
    h.close()
""")


def test_readonly_reader_while_another_process_writes(tmp_path):
    path = tmp_path / "h.db"
    proc = subprocess.Popen([sys.executable, "-c", WRITER, str(path)], cwd=REPO, text=True,
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            env={**os.environ, "PYTHONPATH": str(REPO)})
    try:
        assert proc.stdout.readline() == "committed\n"
        ro = History(path, readonly=True)
        assert ro.run("m1")["title"] == "from the writer"
        assert [e["message"] for e in ro.events()] == ["first"]
        marker = ro.change_marker()
        proc.stdin.write("\n")
        proc.stdin.flush()
        assert proc.stdout.readline() == "holding\n"
        start = time.perf_counter()
        assert [e["message"] for e in ro.events()] == ["first"]  # no error, no wait, no dirty read
        assert ro.runs()[0]["name"] == "m1"
        assert time.perf_counter() - start < 5.0
        proc.stdin.write("\n")
        proc.stdin.flush()
        assert proc.stdout.readline() == "done\n"
        assert [e["message"] for e in ro.events()] == ["first", "uncommitted", "second"]
        assert ro.change_marker() != marker
        proc.stdin.write("\n")
        proc.stdin.flush()
        assert proc.wait(timeout=30) == 0, proc.stderr.read()
        ro.close()
        # after the writer has gone (and SQLite may have removed the -wal file) a reader still opens
        again = History(path, readonly=True)
        assert len(again.events()) == 3
        again.close()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_json_columns_are_plain_json_text_for_other_tools(hist):
    hist.upsert_run("m1", labels=["a"], targets={"ess": 400})
    hist.add_snapshot("m1", _row(1))
    con = sqlite3.connect(hist.path)
    labels, targets = con.execute("SELECT labels, targets FROM runs").fetchone()
    verdict = con.execute("SELECT verdict FROM snapshots").fetchone()[0]
    con.close()
    assert json.loads(labels) == ["a"] and json.loads(targets) == {"ess": 400}
    assert json.loads(verdict)["enough"] is False


def test_published_docs_list_every_snapshot_column():
    """docs/interfaces.md is the published contract: each column of the one spec appears there."""
    from chainvigil.storage.history import SNAPSHOT_COLUMNS, csv_columns, snapshot_record

    text = (Path(__file__).resolve().parent.parent / "docs" / "interfaces.md").read_text()
    missing = [c.name for c in SNAPSHOT_COLUMNS if f"| `{c.name}` |" not in text]
    assert missing == []
    # The JSON record and the CSV header come from the same spec.
    record = snapshot_record({c.name: None for c in SNAPSHOT_COLUMNS} | {"run": "r", "seq": 1})
    assert record["schema"] >= 1 and set(record) >= {"loo", "waic", "pareto_k", "mixing", "verdict"}
    assert csv_columns()[:3] == ("run", "seq", "time_iso")
    assert set(csv_columns()[3:]) == {c.name for c in SNAPSHOT_COLUMNS} - {"verdict"}


def test_csv_rounding_follows_the_spec():
    from chainvigil.storage.history import csv_columns, csv_row

    row = {"run": "r", "seq": 1, "time": 0.5, "loo_elpd": -171.23456, "loo_mcse": 0.0123456,
           "k_above": 3, "ess_bulk_min": 1234.6}
    out = dict(zip(csv_columns(), csv_row(row)))
    assert out["time_iso"] == "1970-01-01T00:00:00.500Z"
    assert out["loo_elpd"] == -171.23 and out["loo_mcse"] == 0.0123 and out["k_above"] == 3
    assert out["ess_bulk_min"] == 1235 and out["waic_elpd"] == ""


def test_reader_position_last_draw_and_warmup_are_committed_with_each_piece(hist):
    hist.upsert_chain("m1", "c1", kind="csv", param_names=["mu"])
    hist.commit_ingest("m1", "c1", "c1.csv", 30, 30, offset=900, position=30, last_draw=30, warmup=30)
    # thinned by 3 after 50 warm-up draws: positions 30..89 give 20 warm-up + 10 kept draws
    hist.commit_ingest("m1", "c1", "c1.csv", 30, 60, offset=2700, position=90, last_draw=90, warmup=50)
    assert hist.committed("m1", "c1") == {"draws": 60, "offsets": {"c1.csv": 2700}, "chunks": set(),
                                          "warmup": 50, "position": 90, "last_draw": 90}
    assert [(r["position"], r["last_draw"]) for r in hist.manifest("m1", "c1")] == [(30, 30), (90, 90)]
    assert hist.chains("m1")[0]["warmup"] == 50
    with pytest.raises(ValueError, match="warm-up count"):
        hist.commit_ingest("m1", "c1", "c1.csv", 1, 61, offset=2730, warmup=62)
    hist.upsert_run("m1", read_options={"loglik": "log_lik", "warmup": 50, "thin": 3, "params": None,
                                        "ignore": ["y_rep*"]})
    assert hist.run("m1")["read_options"]["ignore"] == ["y_rep*"]


def test_a_version_2_file_is_migrated_keeping_its_rows(tmp_path):
    """A history written before read options existed: the new columns are added, old rows kept (null
    positions, no warm-up), and any SQLite tool sees the columns."""
    path = tmp_path / "old.db"
    con = sqlite3.connect(path)
    con.executescript("""
        CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT);
        INSERT INTO meta VALUES ('schema_version', '2');
        CREATE TABLE runs (name TEXT PRIMARY KEY, folder TEXT, title TEXT, dataset TEXT, n_obs INTEGER,
            n_params INTEGER, point_loglik REAL, labels TEXT, targets TEXT, state TEXT, first_seen REAL,
            updated REAL, enough_at REAL, state_reason TEXT);
        CREATE TABLE chains (run TEXT NOT NULL, chain TEXT NOT NULL, kind TEXT, param_names TEXT,
            header TEXT, draws INTEGER NOT NULL DEFAULT 0, PRIMARY KEY (run, chain));
        CREATE TABLE manifest (id INTEGER PRIMARY KEY, run TEXT NOT NULL, chain TEXT NOT NULL,
            source TEXT, "offset" INTEGER, chunk TEXT, draws_added INTEGER, draws_after INTEGER, time REAL);
        CREATE TABLE mixing (snapshot_id INTEGER NOT NULL, run TEXT, param TEXT, mean REAL, mcse REAL,
            rhat REAL, ess_bulk REAL, ess_tail REAL);
        INSERT INTO runs (name, state) VALUES ('old', 'collecting');
        INSERT INTO chains (run, chain, kind, param_names, draws) VALUES ('old', 'a', 'csv', '["mu"]', 40);
        INSERT INTO manifest (run, chain, source, "offset", draws_added, draws_after, time)
            VALUES ('old', 'a', 'a.csv', 1234, 40, 40, 0);
    """)
    con.close()
    with pytest.raises(ValueError, match="older"):
        HistoryReader(path)
    writer = HistoryWriter(path)
    assert writer.schema_version() == SCHEMA_VERSION == 11
    assert writer.committed("old", "a") == {"draws": 40, "offsets": {"a.csv": 1234}, "chunks": set(),
                                            "warmup": 0, "position": None, "last_draw": None}
    assert writer.run("old")["read_options"] is None
    assert writer.run("old")["state"] == "gathering"  # and the version-7 step renamed its state
    writer.commit_ingest("old", "a", "a.csv", 10, 50, offset=1500, position=50, last_draw=50, warmup=0)
    writer.close()
    con = sqlite3.connect(path)
    assert con.execute("SELECT position, last_draw FROM manifest ORDER BY id").fetchall() == \
        [(None, None), (50, 50)]
    con.close()


# ---------------------------------------------------------------- version 4: mixing figures, pairs

_V4_MIXING = ("sd", "q05", "q95", "chain_means", "chain_sds", "more_draws")


def test_version_3_file_is_migrated_and_old_rows_read_null(tmp_path):
    path = tmp_path / "old.db"
    h = History(path)
    sid = h.add_snapshot("m1", {"draws": 40}, [{"param": "mu", "mean": 1.0, "rhat": 1.2}])
    h.close()
    con = sqlite3.connect(path)  # turn it back into a version-3 file
    con.execute("DROP TABLE comparison_pairs")
    for column in _V4_MIXING:
        con.execute(f"ALTER TABLE mixing DROP COLUMN {column}")
    con.execute("UPDATE meta SET value = '3' WHERE key = 'schema_version'")
    con.commit()
    con.close()
    with pytest.raises(ValueError, match="older"):
        History(path, readonly=True)
    h = History(path)  # the writer migrates
    assert h.schema_version() == SCHEMA_VERSION == 11
    old = h.mixing(sid)[0]
    assert old["rhat"] == 1.2 and all(old[c] is None for c in _V4_MIXING)
    h.add_comparison("d", _cmp(["a", "b"], [0.0, -1.0]), pairs=[{"run_a": "a", "run_b": "b", "delta": 1.0}])
    assert h.comparison_pairs(1)[0]["delta"] == 1.0
    h.close()


def test_mixing_spread_chains_and_projection_round_trip(hist):
    sid = hist.add_snapshot("m1", {"draws": 400}, [
        {"param": "mu", "mean": 0.5, "sd": 1.5, "q05": -2.0, "q95": 3.0, "chain_means": [0.1, 0.9],
         "chain_sds": [1.4, float("nan")], "more_draws": 120, "rhat": 1.05},
        {"param": "tau", "mean": 2.0}])
    mu, tau = hist.mixing(sid)
    assert (mu["sd"], mu["q05"], mu["q95"], mu["more_draws"]) == (1.5, -2.0, 3.0, 120)
    assert mu["chain_means"] == [0.1, 0.9] and mu["chain_sds"] == [1.4, None]  # JSON, NaN as null
    assert tau["chain_means"] is None and tau["sd"] is None
    raw = hist.conn.execute("SELECT chain_means FROM mixing WHERE param = 'mu'").fetchone()[0]
    assert json.loads(raw) == [0.1, 0.9]  # plain JSON text for other tools
    with pytest.raises(ValueError, match="chain_mean"):
        hist.add_snapshot("m1", {"draws": 400}, [{"param": "mu", "chain_mean": [1.0]}])


def test_comparison_pairs_are_written_with_their_round(hist):
    pairs = [{"run_a": "x", "run_b": "y", "delta": 1.0, "se_delta": 0.5, "mcse_delta": 0.1,
              "caution": True, "may_flip": False},
             {"run_a": "x", "run_b": "z", "delta": 9.0, "se_delta": 2.0, "mcse_delta": 0.2,
              "caution": False, "may_flip": False},
             {"run_a": "y", "run_b": "z", "delta": 8.0, "se_delta": 1.8, "mcse_delta": 0.2,
              "caution": False, "may_flip": False}]
    r1 = hist.add_comparison("radon", _cmp(["x", "y", "z"], [0.0, -1.0, -9.0]), time=10.0, pairs=pairs)
    r2 = hist.add_comparison("wells", _cmp(["a", "b"], [0.0, -3.0]), time=20.0)
    got = hist.comparison_pairs(r1)
    assert [(p["run_a"], p["run_b"], p["se_delta"], p["caution"]) for p in got] == [
        ("x", "y", 0.5, 1), ("x", "z", 2.0, 0), ("y", "z", 1.8, 0)]
    assert all(p["dataset"] == "radon" and p["time"] == 10.0 for p in got)
    assert hist.comparison_pairs(r2) == []
    with pytest.raises(ValueError, match="run_b"):
        hist.add_comparison("radon", _cmp(["x", "y"], [0.0, -1.0]), pairs=[{"run_a": "x"}])
    # a refused pair leaves no half-written round behind (one transaction)
    assert {c["round"] for c in hist.comparisons()} == {r1, r2}


# ---------------------------------------------------------------- version 7: the run-state words

_V6_TO_V7 = {"run_collecting": "gathering", "run_settled": "enough", "run_attention": "needs_a_look",
             "run_set_aside": "set_aside", "run_paused": "paused", "run_finished": "finished"}


def _version_6_file(path: Path) -> Path:
    """A history file as the version-6 writer left it (tests/data/history_v6.sql: its own DDL and rows)."""
    con = sqlite3.connect(path)
    con.executescript((REPO / "tests" / "data" / "history_v6.sql").read_text(encoding="utf-8"))
    con.close()
    return path


def _raw(path: Path, sql: str) -> list:
    con = sqlite3.connect(path)
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_a_version_6_file_gets_the_run_state_words_the_screen_shows(tmp_path):
    path = _version_6_file(tmp_path / "v6.sqlite")
    before = {name: state for name, state in _raw(path, "SELECT name, state FROM runs")}
    assert set(before.values()) == {"collecting", "settled", "attention", "set_aside", "paused", "finished"}
    untouched = "SELECT name, title, enough_at, state_reason, updated FROM runs ORDER BY name"
    v6_columns = ", ".join(row[1] for row in _raw(path, "PRAGMA table_info(snapshots)"))
    same_snapshots = f"SELECT {v6_columns} FROM snapshots ORDER BY id"  # later versions add columns
    rows_before, snaps_before = _raw(path, untouched), _raw(path, same_snapshots)
    with pytest.raises(ValueError, match="older"):  # a reader never sees the old words
        HistoryReader(path)
    with HistoryWriter(path) as writer:  # the writer migrates
        assert writer.schema_version() == SCHEMA_VERSION == 11
        assert {r["name"]: r["state"] for r in writer.runs()} == _V6_TO_V7
    # only runs.state changed: titles ("settled run"), times, reasons and every snapshot are as they were;
    # the verdict's check named "settled" keeps its name
    assert _raw(path, untouched) == rows_before
    assert _raw(path, same_snapshots) == snaps_before
    assert all('"name": "settled"' in v for (v,) in _raw(path, "SELECT verdict FROM snapshots"))
    with HistoryReader(path) as reader:
        assert reader.run("run_settled")["enough_at"] == 1790000011.0
    # the old words are refused from now on
    with HistoryWriter(path) as writer, pytest.raises(ValueError, match="not one of"):
        writer.set_run_state("run_paused", "settled")


def test_the_version_7_step_is_idempotent(tmp_path):
    """Run twice (as after a kill between the step and the version bump) it changes nothing more;
    a state written in the new words before the step ran stays."""
    from chainvigil.storage.history import MIGRATIONS

    path = _version_6_file(tmp_path / "v6.sqlite")
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("UPDATE runs SET state = 'enough' WHERE name = 'run_paused'")
    expected = {**_V6_TO_V7, "run_paused": "enough"}
    for _ in range(2):
        MIGRATIONS[6](con)
        assert dict(con.execute("SELECT name, state FROM runs")) == expected
    assert con.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone() == ("6",)
    con.close()
    with HistoryWriter(path) as writer:  # the version bump runs the step a third time
        assert {r["name"]: r["state"] for r in writer.runs()} == expected
        assert writer.schema_version() == SCHEMA_VERSION
    with HistoryWriter(path) as writer:  # a current file is opened as it is
        assert {r["name"]: r["state"] for r in writer.runs()} == expected


# ---------------------------------------------------------------- thinning of old snapshot rows

def _verdict_row(i, passed: bool, failing=("mcse",)):
    row = _row(i)
    row["verdict"] = {"enough": False, "passed": passed,
                      "checks": [{"name": c, "ok": False} for c in failing] + [{"name": "rhat", "ok": True}]}
    return row


def test_old_snapshot_rows_are_thinned_keeping_what_the_screen_needs(hist, monkeypatch):
    """Rows older than the recent window keep: the first, each verdict change, rows whose pointwise
    values are kept, and rows spaced geometrically in draws; the latest window stays whole; the
    screen's reader and the at-or-before lookups work on what is left."""
    from chainvigil.storage import history as module

    monkeypatch.setattr(module, "SNAPSHOT_RECENT", 50)
    monkeypatch.setattr(module, "SNAPSHOT_THIN_BATCH", 10)
    monkeypatch.setattr(module, "SNAPSHOT_SPACING", 1.1)
    changes = {137, 138, 260}  # the verdict flips at 137, back at 138, and the failing checks change at 260
    ids = {}
    for seq in range(1, 401):
        passed = seq == 137
        failing = ("mcse", "ess-bulk") if seq >= 260 else ("mcse",)
        ids[seq] = hist.add_snapshot("m1", _verdict_row(seq, passed, failing), [{"param": "mu", "rhat": 1.0 + seq}],
                                     pointwise=_pw(3, float(seq)) if seq % 7 == 0 else None,
                                     keep_pointwise=seq == 91)
    snaps = hist.snapshots("m1")
    seqs = [s["seq"] for s in snaps]
    assert seqs[0] == 1 and seqs[-1] == 400
    # thinned up to 400 - 50 = 350; everything after it is whole
    assert [s for s in seqs if s > 350] == list(range(351, 401))
    old = [s for s in seqs if s <= 350]
    assert len(old) < 100  # 350 rows became a few dozen
    assert changes <= set(old)  # every change of the verdict is kept
    con = sqlite3.connect(hist.path)
    pinned = {r[0] for r in con.execute("SELECT DISTINCT s.seq FROM pointwise_history h JOIN snapshots s "
                                        "ON s.id = h.snapshot_id")}
    orphans = con.execute("SELECT COUNT(*) FROM mixing WHERE snapshot_id NOT IN (SELECT id FROM snapshots)").fetchone()[0]
    con.close()
    assert 91 in pinned and pinned <= set(seqs)  # every kept pointwise set still has its row
    assert orphans == 0  # the mixing rows of a thinned snapshot go with it
    # between changes, the kept rows are spaced geometrically in draws (100 x seq per chain)
    draws = [100 * s for s in old if s not in changes and s not in pinned]
    assert all(b >= 1.1 * a or b in (100 * c for c in changes) for a, b in zip(draws, draws[1:]))
    # at-or-before lookups land on the nearest kept row's values
    gone = next(s for s in range(2, 351) if s not in set(seqs))
    rows = hist.pointwise("m1", ids[gone])
    assert rows == [] or rows[0]["snapshot_id"] <= ids[gone]
    from chainvigil.tui.loader import Loader, Request

    view = Loader(hist.path).load(Request(run="m1", seq=gone))
    assert view.snap["seq"] < gone and view.snap["seq"] in seqs  # the cursor lands on a kept row
    latest = Loader(hist.path).load(Request(run="m1"))
    assert latest.snap["seq"] == 400 and latest.n_snapshots == len(seqs)
    assert latest.mixing_trail["mu"]  # the mixing rows of the spaced points are there for the chart


def test_thinning_goes_on_across_writers_without_looking_at_rows_twice(tmp_path, monkeypatch):
    from chainvigil.storage import history as module

    monkeypatch.setattr(module, "SNAPSHOT_RECENT", 20)
    monkeypatch.setattr(module, "SNAPSHOT_THIN_BATCH", 10)
    path = tmp_path / "h.db"
    h = History(path)
    for seq in range(1, 61):
        h.add_snapshot("m1", _verdict_row(seq, False))
    h.close()
    h = History(path)  # a restart: the watermark is in the file
    for seq in range(61, 121):
        h.add_snapshot("m1", _verdict_row(seq, False))
    seqs = [s["seq"] for s in h.snapshots("m1")]
    con = sqlite3.connect(path)
    mark = con.execute("SELECT value FROM meta WHERE key = 'snapshots_thinned:m1'").fetchone()[0]
    con.close()
    h.close()
    assert mark == "100" and seqs[0] == 1 and seqs[-21:] == list(range(100, 121))
    # no change of verdict: only the geometric chain (x 1.01 in draws) of the first 100 rows is left
    kept = [s for s in seqs if s <= 100]
    assert all(b >= 1.01 * a for a, b in zip(kept, kept[1:]))
