"""How the history file grows over days of snapshots at a 5 s cadence (snapshot rows and the commit log).

Writes ``--days`` days of one run's snapshots straight through the real ``HistoryWriter`` (no
scoring, so days take a minute): one snapshot every ``--every`` seconds of simulated time, each with
a verdict of the size the service writes (about 1.6 kB of JSON: eight checks, one note), ``--params``
mixing rows, and ``--chunks`` NPZ chunk commits (a manifest row and a ``sources`` row each).  The
verdict passes and fails in turns of ``--flip-hours`` hours, so the thinning keeps change points.
Pointwise values are left out here: their geometric sets are n rows each (about 0.55 MB at
n = 10,000) and their count grows like log(draws) (``pointwise_history``, docs/storage.md).

Printed per day: the file size (after a WAL checkpoint), the growth that day, the snapshot rows
left, and the bytes per table (SQLite's dbstat).

    .venv/bin/python bench/history_size.py [--days 3] [--every 5] [--params 2] [--chunks 1]

Measured (2026-12-03, branch ``restart``; n plays no part here):

  --days 3 --every 5 --params 2 --chunks 1 (17,280 snapshots and 17,280 chunk commits a day):
    before (``--keep-all``: every snapshot row kept, as before this branch): 44.9 MB on day 1 and
      +44.9 MB every day (snapshots 35.5 MB, i.e. 2.05 kB per row, mostly the verdict JSON of about
      1.4 kB; mixing rows 4.4 MB; the commit log, manifest + sources + their indexes, 4.2 MB).
    after (snapshot rows thinned, docs/storage.md): 8.0 MB on day 1, +4.4 MB on day 2 and on day 3;
      1,368 / 1,426 / 1,454 snapshot rows left of 17,280 / 34,560 / 51,840 (the latest 720, the
      verdict's changes every 2 hours, and the rows 1.01x apart in draws); snapshots 3.2-3.4 MB flat;
      what still grows is the commit log, about 255 bytes per committed chunk (a sampler writing
      four chunks per 5 s adds 17.6 MB a day).
  With the geometric pointwise sets at n = 10,000 (about 26 MB the first day and 2 MB a day after,
  bench/long_run.py) a run at a 5 s cadence comes to about 34 MB the first day and 6-7 MB a day
  after (one chunk per snapshot), against about 71 MB and 47 MB before.
"""
from __future__ import annotations

import argparse
import sqlite3
import tempfile
import time
from pathlib import Path

from chainvigil.storage.history import HistoryWriter

CHECKS = ("rhat", "ess-bulk", "ess-tail", "mcse", "k-hat", "settled", "floor", "compare")


def verdict(i: int, passed: bool) -> dict:
    note = ("rough projection from the draws so far; the rate is pooled over this and earlier "
            f"snapshots since half the draws ({i})")
    return {"enough": False, "passed": passed, "refit": [], "more_draws": 120 + i % 50, "minutes": 3.5,
            "cautions": [], "activity": "growing", "stop_rule": "held",
            "hold": {"snapshots": i % 40, "since_draws_per_chain": 100 + i},
            "checks": [{"name": name, "ok": passed or name != "mcse", "value": 0.1234 + i * 1e-6,
                        "target": 0.1, "more_draws": 0 if passed else 120, "minutes": 2.5,
                        "note": note if name == "mcse" else None, "margin": True} for name in CHECKS]}


def table_bytes(path: Path) -> dict:
    con = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        return dict(con.execute("select name, sum(pgsize) from dbstat group by name"))
    except sqlite3.Error:
        return {}
    finally:
        con.close()


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--days", type=int, default=3)
    ap.add_argument("--every", type=float, default=5.0, help="seconds between snapshots")
    ap.add_argument("--params", type=int, default=2, help="mixing rows per snapshot")
    ap.add_argument("--chunks", type=int, default=1, help="chunk commits per snapshot")
    ap.add_argument("--flip-hours", type=float, default=2.0, help="the verdict changes this often")
    ap.add_argument("--keep-all", action="store_true", help="no thinning of snapshot rows (as before)")
    args = ap.parse_args(argv)
    if args.keep_all:
        from chainvigil.storage import history as history_module
        history_module.SNAPSHOT_RECENT = 10**12
    per_day = int(round(86400 / args.every))
    flip = max(1, int(round(args.flip_hours * 3600 / args.every)))
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "history.sqlite"
        h = HistoryWriter(path)
        h.upsert_run("long", n_obs=10_000)
        t0, start, before = 1.7e9, time.time(), 0
        chunk = 0
        for day in range(1, args.days + 1):
            for k in range(per_day):
                i = (day - 1) * per_day + k
                now = t0 + i * args.every
                per_chain = 10 + i  # one draw per chain per snapshot
                passed = (i // flip) % 2 == 1
                row = {"time": now, "chains": 4, "draws": 4 * per_chain, "draws_per_chain": per_chain,
                       "draw_rate": 0.2, "r_eff_mean": 0.31, "r_eff_source": "streaming",
                       "loo_elpd": -14000.0 + 1e-3 * i, "loo_se": 80.0, "loo_mcse": 0.5, "loo_p_eff": 3.0,
                       "waic_elpd": -14000.0, "waic_se": 80.0, "waic_p_eff": 3.0, "k_max": 0.4,
                       "k_threshold": 0.7, "k_above": 0, "rhat_max": 1.001, "ess_bulk_min": 800.0,
                       "ess_tail_min": 700.0, "enough": 0, "verdict": verdict(i, passed),
                       "loo_method": "psis", "mixing_draws": per_chain}
                mixing = [{"param": f"theta[{j}]", "mean": 0.1, "mcse": 0.01, "rhat": 1.001, "ess_bulk": 800.0,
                           "ess_tail": 700.0, "sd": 0.3, "q05": -0.4, "q95": 0.6, "chain_means": [0.1] * 4,
                           "chain_sds": [0.3] * 4, "more_draws": 0} for j in range(args.params)]
                h.add_snapshot("long", row, mixing)
                for _ in range(args.chunks):
                    name = f"{chunk:08d}.npz"
                    h.commit_ingest("long", "c1", f"c1/{name}", 1, chunk + 1, chunk=name, kind="npz",
                                    identity={"origin": "c1", "dev": 2049, "ino": 1_000_000 + chunk,
                                              "size": 80_512, "mtime_ns": int(now * 1e9),
                                              "digest": f"{chunk:064x}"}, position=chunk + 1, last_draw=chunk + 1)
                    chunk += 1
            h.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            size = path.stat().st_size
            rows = h.conn.execute("select count(*) from snapshots").fetchone()[0]
            parts = table_bytes(path)
            top = ", ".join(f"{name} {b / 1e6:.1f}" for name, b in sorted(parts.items(), key=lambda kv: -kv[1])[:6])
            print(f"day {day}: file {size / 1e6:6.1f} MB (+{(size - before) / 1e6:5.1f} MB this day), "
                  f"{rows:,} snapshot rows left of {day * per_day:,}; {time.time() - start:.0f} s; MB: {top}",
                  flush=True)
            before = size
        h.close()


if __name__ == "__main__":
    main()
