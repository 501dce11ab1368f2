"""A long run through the real service: does the cost per snapshot and the history stay flat?

A simulated run of many small chunks drives ``Service.cycle()`` directly (``every=0``: every cycle
that brings new draws takes a snapshot).  Each cycle one chain (round robin over 4) writes one NPZ
chunk of ``--block`` draws through the real ``ChainWriter`` into a temporary root; the service
ingests it into the real zarr store and SQLite history and snapshots the run.  Printed per scenario:

* cost per snapshot (the ``cycle()`` call: ingest + scoring + history write) over the first and the
  last tenth of the snapshots, and their ratio (flat cost: about 1), as wall time and as CPU time of
  this process (all its threads; steadier than wall time when other jobs share the machine);
* the slowest cycle and how many cycles took more than 5x the median (r_eff refreshes and tail
  buffer rebuilds reread the store);
* the history file size (SQLite file + WAL) per 1,000 snapshots, and the draw store on disk;
* restart: a new ``Service`` on the same root and state, timed from construction to the end of
  its first ``cycle()`` (which writes a snapshot).  Today this re-streams every draw from the
  store; the figure with a checkpoint goes in the marked place below.

Scenarios: n = ``--n`` (2,000) with ``--snapshots`` (20,000), and n = ``--big-n`` (10,000) with
``--big-snapshots`` (2,000).  Timings are noisy on a shared machine; run it on a quiet one.

    .venv/bin/python bench/long_run.py [--snapshots 20000] [--n 2000] [--block 2]
                                       [--big-snapshots 2000] [--big-n 10000] [--skip-big]

Measured before the long-run work (2026-12-03, branch ``longrun`` at 6a8978c and 9520a74;
2 cores shared with four other jobs, load average 8-12, so wall times are inflated and drift with the
load; CPU time is this process's own).  The defaults were too slow to run on today's code; shorter
runs, ``--block 2``:

  n = 2,000, --snapshots 2000 (4,010 draws): cost per snapshot 82.7 ms first tenth, 693 ms last
      tenth (wall), ratio 8.4; 6 cycles over 5x the median (slowest 2.8 s; r_eff refreshes and tail rebuilds reread the store, not told apart here);
      history 27.8 MB per 1,000 snapshots (28 kB per snapshot: pointwise_history, every 5th
      snapshot keeps n rows); store 8.18 bytes per draw per observation; restart 1.46 s.
  n = 2,000, --snapshots 1000 (2,010 draws): 56 ms -> 140 ms CPU (ratio 2.5; wall 118 -> 179 ms);
      history 27.7 MB per 1,000 snapshots; restart 0.75 s wall / 0.52 s CPU.
      Again at a lower load (1.6-5.6): 56 ms -> 168 ms CPU (ratio 3.0; wall 57 -> 222 ms), 21 cycles
      over 5x the median (slowest 0.66 s); restart 1.59 s wall / 0.62 s CPU.
  n = 10,000, --big-snapshots 300 (610 draws): 217 -> 448 ms wall (ratio 2.1); history 130 MB per
      1,000 snapshots (143 kB per snapshot); restart 1.64 s.
  n = 10,000, --big-snapshots 200 (410 draws): 133 -> 190 ms CPU (ratio 1.4); restart 0.74 s;
      again at a lower load 109 -> 225 ms CPU (ratio 2.1), restart 0.85 s.

The CPU cost grows by about 0.09 ms per snapshot at n = 2,000 (0.045 ms per draw); if that stays
linear, the default 20,000 snapshots would end near 1.9 s CPU per snapshot and take about 6 CPU-hours,
with a 560 MB history and a restart re-streaming 40,000 draws (about 15 s at the rate above).
Restart from a checkpoint: not measurable yet (no checkpoint in this version).

AFTER the long-run work (2026-12-03, branch ``longwire``; same settings, same shared machine, load
average 8-16).  The cycle's CPU is now split into ``StreamingScorer.scores`` (PSIS-LOO over the
tail, whose length M = min(S/5, 3 sqrt(S/r_eff)) grows with the draws) and the rest:

  n = 2,000, --snapshots 1000 (2,012 draws): 42.6 -> 174.9 ms CPU (ratio 4.1; wall 123 -> 490 ms);
      scores() 14.3 -> 117.1 ms (x8.2: M grows from about 40 to 240 per observation, S/5-bound at the
      start), the rest 28.3 -> 57.9 ms (x2.0: the store's partial-chunk flush is a sawtooth over
      256-draw chunks and sits near its top in the last tenth; the NPZ folder listing, +8 ms at
      1,000 chunk files; the bounded trail, +2 ms; mixing, +2 ms); history 3.76 MB per 1,000
      snapshots (was 27.7; 5.3 kB per snapshot at the end); restart 0.92 s wall / 0.70 s CPU
      re-streaming, 0.41 s wall / 0.40 s CPU from the checkpoint.
  n = 10,000, --big-snapshots 300 (612 draws): 134.9 -> 298.4 ms CPU (ratio 2.2); scores() 55 ->
      186 ms (x3.4), the rest 80 -> 112 ms (x1.4); history 26.3 MB per 1,000 snapshots (was 130;
      in so short a run the geometric pointwise sets dominate: about 20 sets of n rows between 2 and
      153 draws per chain, 0.5 MB each, which later grow only like log(draws)); restart 1.54 s
      re-streaming, 1.16 s from the checkpoint.

So the fixed-cadence ratio target (<= 1.2) is not reachable while PSIS's tail grows: scores() alone
costs 23 ms at S = 200, 170 ms at 2,000, 533 ms at 8,000 and 852 ms at 20,000 draws (n = 2,000,
measured on the scorer alone); mixing 2 -> 30 ms over the same range; the streaming r_eff 0.7 ms
throughout.  The stretching cadence (interval growing to 60 s once a run's state has not changed for
10 minutes) divides the cost per hour of a settled run by up to 12 at the default 5 s.  History per
day at n = 10,000 and 5 s: about 2.2 kB per snapshot row (17,280 a day: 38 MB) plus about 52
geometric pointwise sets of 0.5 MB from 10 to 10^6 draws per chain (26 MB): about 64 MB the first day;
after it, with the stretched cadence, about 3 MB of rows and 2 MB of pointwise sets a day (a run whose
state keeps changing stays at 5 s: 38 MB a day).  Restart at n = 10,000 with 20,000 draws
(bench/restart_checkpoint.py): re-streaming 6.9 s CPU through the scorer plus reading 1.6 GB from the
store; from the checkpoint a 320 MB load (6 s under load) plus the first scores() 3 s: 9-10 s either
way at this size; at 100,000 draws the re-stream grows five-fold (34 s plus 8 GB of reads) while the
checkpoint grows with the tail buffer (sqrt: about 700 MB) and the first scores() to about 7 s, so the
10 s goal is not met at 100,000 draws with n = 10,000: the checkpoint's tail buffer is the next thing
to shrink.

AFTER the flat-cycle work (2026-12-03, branch ``restart``; same settings, same shared machine, load
average 5-9).  Chunk folders are listed in full on a schedule (every taken/64 passes past 64 chunks;
in between the next numbered chunks are looked up), mixing is recomputed as draws per chain grow by
5 % (past 128 per chain), the verdict's trail is trimmed when it doubles and each point is validated
once, old snapshot rows are thinned (docs/architecture.md, "What a snapshot recomputes"):

  n = 2,000, --snapshots 2000 (4,012 draws): 54.0 -> 205.6 ms CPU (ratio 3.81; wall 87 -> 224 ms);
      scores() 19.6 -> 168.4 ms (x8.6, the PSIS tail: not part of this work), the rest of the cycle
      34.4 -> 37.2 ms CPU (x1.08, was x2.0 over half as many snapshots); 12 cycles over 5x the
      median (slowest 1.4 s); history 2.45 MB per 1,000 snapshots (was 3.76), 915 snapshot rows
      left of 2,000 written; restart 1.02 s wall / 0.99 s CPU re-streaming, 0.33 s / 0.30 s CPU
      from the checkpoint.
  n = 2,000, --snapshots 1000, with the first version of this work (full listings every taken/256
      passes, so every pass below 256 chunks per chain; mixing at every snapshot below 512 draws per
      chain, i.e. throughout): 57.0 -> 185.8 ms CPU; scores() 17.2 -> 119.1 ms; the rest 39.8 ->
      66.8 ms (x1.68): a cProfile of the last 200 cycles at 800 snapshots showed 72 ms per cycle
      in stat calls comparing the identities of every taken chunk, which led to the 64 above.
  n = 2,000, --snapshots 4000 (8,012 draws; 20 minutes on the shared machine, so not the issue's
      20,000): 80.8 -> 387.8 ms CPU (ratio 4.8); scores() 37.9 -> 335.9 ms (x8.9); the rest of the
      cycle 42.8 -> 51.9 ms CPU (x1.21; this CPU includes the joint-MCSE pass thread, whose passes
      read every stored draw once per quarter of growth); 21 cycles over 5x the median (slowest 11 s,
      under load); history 1.32 MB per 1,000 snapshots (file 8.4 MB, 1,004 snapshot rows left of
      4,000); restart 2.01 s wall / 2.81 s CPU re-streaming, 0.46 s / 0.45 s CPU from the checkpoint.
  Not run here: the default 20,000 snapshots (scores() alone would be near 0.85 s per snapshot at
  the end, hours of CPU) and the n = 10,000 scenario.

History per day at n = 10,000 and a 5 s cadence (bench/history_size.py for the snapshot rows and
the commit log): about 34 MB the first day and 6-7 MB a day after (was about 71 MB and 47 MB for a
run whose verdict keeps changing); what still grows is the commit log, about 255 bytes per chunk
committed, and the geometric pointwise sets (about 2 MB a day after the first).  Restart at
n = 10,000 with 100,000 stored draws: bench/restart_checkpoint.py --service.

MERGED MAIN at the issue's size (2026-12-03; incremental PSIS-LOO, flat cycle, thinning; the first
hour beside another benchmark and a CI run on the 2 cores, so wall times are noisy; CPU is this
process's, all threads, the joint-MCSE pass thread included):

  n = 2,000, --snapshots 20000 --block 2 (40,012 draws, 2,973 s in cycle()): 108.9 -> 202.0 ms CPU
      per snapshot, first -> last tenth (ratio 1.85; wall 155.8 -> 155.2 ms, 1.00, the first tenth
      inflated by the other benchmark); scores() 62.6 -> 133.3 ms CPU (x2.13), the rest 46.3 ->
      68.7 ms (x1.48); 124 cycles over 5x the median (slowest 2.8 s: tail-buffer rebuilds from the
      store as M + 1 outgrows K, each clearing the tail-fit cache, and joint-MCSE passes); history
      0.37 MB per 1,000 snapshots (13.4 MB at the end, 1,182 of 20,000 snapshot rows left); store
      8.20 bytes per draw per observation; restart 1.41 s from the checkpoint, 8.11 s re-streaming.
  n = 10,000, --big-snapshots 1000 (2,012 draws): 209.3 -> 458.8 ms CPU (ratio 2.19); scores() 66
      -> 340 ms (x5.15: at these few draws M = ceil(S/5) grows with every snapshot, so every tail is
      refitted each time), the rest 143 -> 119 ms (x0.83); history 10.1 MB per 1,000 snapshots;
      restart 0.40 s from the checkpoint, 2.54 s re-streaming.
  Not flat yet: the ratio target (<= 1.2) is missed.  The scorer alone is flat
  (bench/incremental_scores.py: 0.59); in the service the streaming r_eff moves M_i of some rows each
  snapshot, rebuilds clear the cache, and the pass thread's CPU lands in the measured windows.

AFTER the third session's work (2026-12-03, main at e4da852: the verdict reads an indexed trail in
O(log N) instead of walking the points since half the draws; a rebuild keeps the tail-fit cache; the
pass thread runs 10 nice steps lower; CPU per thread group).  The first tenth ran while two test
suites shared the 2 cores (load about 3), the rest on a quiet machine; ``scores()`` was timed with the
process clock in this run (the pass and store threads running meanwhile count in it):

  n = 2,000, --snapshots 20000 --block 2 (40,012 draws, 2,405 s in cycle()): 94.1 -> 128.9 ms wall
      (ratio 1.37), 84.0 -> 178.1 ms CPU (2.12); loop threads 70.3 -> 161.0 ms (x2.29); scores()
      49.8 -> 131.2 ms (x2.63); the rest of the cycle 34.1 -> 46.8 ms CPU (x1.37; was 46.3 -> 68.7
      before); store threads 11.7 -> 16.7 ms; the pass thread 44 s in all (1.1 ms per draw, in
      lumps); 54 cycles over 5x the median (slowest 2.9 s, was 124 cycles); history 0.40 MB per
      1,000 snapshots; store 8.20 bytes per draw per observation; restart 1.20 s from the checkpoint,
      8.89 s re-streaming.
  n = 10,000, --big-snapshots 1000 (2,012 draws): 207.3 -> 380.6 ms wall (1.84), 221.3 -> 518.8 ms
      CPU; scores() 70.8 -> 380.8 ms (x5.38: M = ceil(S/5) throughout, every tail refitted at nearly
      every snapshot), the rest 150.4 -> 138.1 ms (x0.92); history 10.1 MB per 1,000 snapshots;
      restart 0.75 s from the checkpoint, 3.20 s re-streaming.
  Still missed: what grows is PSIS-LOO's own work.  A snapshot of B draws refits the rows a new draw
  entered the tail of (about n B (M + 1) / S) and the rows whose M_i stepped (about n B 1.5 /
  sqrt(S r_eff)), each a Zhang-Stephens fit over M values on a grid of 30 + sqrt(M) points: about
  n B (9 / r_eff)(30 + sqrt M) operations per snapshot, which rises with sqrt(M) and as the
  streaming r_eff settles lower (0.128 at 4,800 draws, 0.100 at 37,600 here).  bench/psis_work.py
  counts that work per snapshot.

AFTER the tail lag (2026-12-03, fourth session, main at efe551f: a live snapshot reuses a PSIS tail
fit until the draws that entered its tail since exceed 5 % of it, ``--tail-lag``, docs/numerics.md
"Tail lag").  Another job (a test suite) shared the 2 cores throughout, more in the first tenth, so
CPU is the figure to read:

  n = 2,000, --snapshots 20000 --block 2 (40,012 draws, 1,371 s in cycle()): 49.6 -> 45.4 ms CPU
      per snapshot (ratio 0.91; wall 73.7 -> 54.6 ms, 0.74); loop threads 34.7 -> 33.1 ms (x0.96);
      scores() 4.7 -> 2.2 ms (x0.48; was 49.8 -> 131.2); the rest of the cycle 30.0 -> 30.9 ms
      (x1.03); store threads 13.1 -> 12.1 ms; 67 cycles over 5x the median (slowest 3.3 s: tail
      buffer rebuilds and joint-MCSE passes); history 0.40 MB per 1,000 snapshots (14.3 MB at the
      end, 1,183 of 20,000 snapshot rows left); store 8.20 bytes per draw per observation; restart
      1.70 s from the checkpoint, 9.89 s re-streaming 40,012 draws.
  n = 10,000, --big-snapshots 1000 (2,012 draws): 191.3 -> 182.6 ms CPU (ratio 0.95; wall 197.1 ->
      193.1 ms, 0.98); scores() 42.4 -> 20.2 ms (was 70.8 -> 380.8); the rest 103.7 -> 111.6 ms
      (x1.08); store threads 25.7 -> 34.3 ms (x1.33, zarr's metadata and partial-chunk writes);
      history 10.1 MB per 1,000 snapshots; restart 0.56 s from the checkpoint, 6.15 s re-streaming.
  The ratio target (<= 1.2) is met at both sizes.  What is left of a snapshot is O(n) and flat:
  ingest and the store (about a third), the history rows and the per-observation lists of the
  snapshot (``Scores.to_dict``, the verdict's k-hat check).
"""

from __future__ import annotations

import argparse
import shutil
import sqlite3
import statistics
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from chainvigil.estimators.streaming import StreamingScorer
from chainvigil.service import Service
from chainvigil.writer import ChainWriter

sys.path.insert(0, str(Path(__file__).resolve().parent))
from _sampler import CHAINS, PARAMS, Sampler  # noqa: E402,F401  (bench/psis_work.py imports them from here)


def folder_bytes(path: Path, pattern: str = "**/*") -> int:
    return sum(p.stat().st_size for p in path.glob(pattern) if p.is_file())


def history_bytes(state_dir: Path, wal: bool = False) -> int:
    """The SQLite history file (with its WAL and shared-memory files if ``wal``)."""
    return sum(p.stat().st_size for p in state_dir.glob("*.sqlite*" if wal else "*.sqlite") if p.is_file())


def history_tables(state_dir: Path) -> list:
    """(table or index, bytes) of the history, largest first (SQLite's dbstat view, if built in)."""
    files = sorted(state_dir.glob("*.sqlite"))
    if not files:
        return []
    con = sqlite3.connect(f"file:{files[0]}?mode=ro", uri=True)
    try:
        return con.execute("select name, sum(pgsize) from dbstat group by name order by 2 desc").fetchall()
    except sqlite3.Error:
        return []
    finally:
        con.close()


def count_snapshots(state_dir: Path) -> int:
    """Snapshots written (the largest seq: old rows are thinned, so fewer rows remain)."""
    files = sorted(state_dir.glob("*.sqlite"))
    if not files:
        return -1
    con = sqlite3.connect(f"file:{files[0]}?mode=ro", uri=True)
    try:
        return con.execute("select coalesce(max(seq), 0) from snapshots").fetchone()[0]
    finally:
        con.close()


def count_rows(state_dir: Path) -> int:
    """Snapshot rows left in the history after thinning."""
    files = sorted(state_dir.glob("*.sqlite"))
    con = sqlite3.connect(f"file:{files[0]}?mode=ro", uri=True)
    try:
        return con.execute("select count(*) from snapshots").fetchone()[0]
    finally:
        con.close()




class ThreadClocks:
    """CPU seconds per group of this process's threads, read from each thread's own CPU clock
    (``time.pthread_getcpuclockid``), so the service loop's cost can be told from the background
    work it never waits for:

    * ``loop``: the main thread (ingest, history, verdict) and the scoring block threads
      (``chainvigil-blocks*``, ``StreamingScorer.scores`` runs its row blocks there);
    * ``pass``: the joint-MCSE pass thread (``chainvigil-joint-pass``), which reads every stored draw
      once per quarter of growth (its amortised cost per draw is constant, but it comes in lumps);
    * ``store``: zarr's I/O and codec threads, shared by the loop's appends and the pass's reads.

    A thread that has ended (a checkpoint writer) is counted in none; ``process_time`` counts all.
    """

    GROUPS = (("pass", ("chainvigil-joint-pass",)), ("loop", ("MainThread", "chainvigil-blocks")),
              ("store", ("zarr", "asyncio")))

    def read(self) -> dict:
        """{group: {thread id: CPU seconds}}: subtract two readings with :meth:`spent` (a thread that
        started or ended between them counts only while both saw it)."""
        out = {name: {} for name, _ in self.GROUPS}
        for t in threading.enumerate():
            group = next((g for g, prefixes in self.GROUPS if t.name.startswith(prefixes)), None)
            if group is None or t.ident is None:
                continue
            try:
                out[group][t.ident] = time.clock_gettime(time.pthread_getcpuclockid(t.ident))
            except (OSError, AttributeError):  # the thread ended meanwhile, or no per-thread clocks
                pass
        return out

    @staticmethod
    def spent(before: dict, after: dict, group: str) -> float:
        b, a = before[group], after[group]
        return sum(a[t] - b[t] for t in a if t in b)


THREADS = ThreadClocks()


class ScoringClock:
    """CPU seconds of the loop's threads (``ThreadClocks`` "loop") spent in
    ``StreamingScorer.scores`` (PSIS-LOO over the tail, WAIC, DIC/AIC): the part of a snapshot whose
    cost grows with the PSIS tail length M = min(S/5, 3 sqrt(S/r_eff)), so the rest of the cycle can
    be told apart.  (The process's CPU would also count the pass and store threads running meanwhile.)"""

    def __init__(self):
        self.spent = 0.0
        original = StreamingScorer.scores

        def timed(scorer, *a, **kw):
            t0 = THREADS.read()
            try:
                return original(scorer, *a, **kw)
            finally:
                self.spent += THREADS.spent(t0, THREADS.read(), "loop")

        StreamingScorer.scores = timed


SCORING = ScoringClock()


def scenario(n: int, snapshots: int, block: int, scratch: Path, label: str) -> dict:
    root = scratch / label
    run_dir = root / "longrun"
    run_dir.mkdir(parents=True)
    state = scratch / f"{label}-state"
    sampler = Sampler(n)
    writers = {c: ChainWriter(run_dir, c, param_names=PARAMS) for c in CHAINS}
    # one chunk per chain first, so every chain exists before the first snapshot
    for c in CHAINS:
        writers[c].append(*sampler.block(c, block))
    svc = Service(root, state, every=0)
    svc.cycle()
    before = count_snapshots(state)
    tenth = max(1, snapshots // 10)
    costs, cpu, psis = [], [], []  # wall and CPU seconds per cycle, and CPU seconds in scores()
    groups = {name: [] for name, _ in ThreadClocks.GROUPS}  # CPU seconds per cycle per thread group
    hist_sizes = [(0, history_bytes(state))]
    t_start = time.perf_counter()
    try:
        for i in range(snapshots):
            c = CHAINS[i % len(CHAINS)]
            writers[c].append(*sampler.block(c, block))
            t0, c0, p0, th0 = time.perf_counter(), time.process_time(), SCORING.spent, THREADS.read()
            svc.cycle()
            costs.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
            psis.append(SCORING.spent - p0)
            th1 = THREADS.read()
            for group in groups:
                groups[group].append(THREADS.spent(th0, th1, group))
            if (i + 1) % tenth == 0:
                hist_sizes.append((i + 1, history_bytes(state)))
                done = time.perf_counter() - t_start
                print(f"    [{label}] {i + 1:,}/{snapshots:,} snapshots, {done:.0f} s, "
                      f"last tenth {statistics.fmean(costs[-tenth:]) * 1e3:.1f} ms/snapshot "
                      f"(CPU {statistics.fmean(cpu[-tenth:]) * 1e3:.1f} ms; loop threads "
                      f"{statistics.fmean(groups['loop'][-tenth:]) * 1e3:.1f} ms)", flush=True)
        svc.checkpoint_now()  # as the clean stop does (and every CHECKPOINT_SECONDS while running)
    finally:
        svc.passes.worker.close()
        svc.close()
    taken = count_snapshots(state) - before
    rows_left = count_rows(state)
    total_draws = (snapshots + len(CHAINS)) * block
    hist_end = history_bytes(state)  # after close: the WAL is checkpointed into the file
    tables = history_tables(state)
    store_bytes = folder_bytes(state, "**/*.zarr/**/*") or folder_bytes(state) - history_bytes(state)

    # restart: a new service on the same state, to its first snapshot (one new chunk waits for it);
    # first from the checkpoint, then (checkpoints deleted) re-streaming every stored draw
    def restart():
        writers[CHAINS[0]].append(*sampler.block(CHAINS[0], block))
        t0, c0 = time.perf_counter(), time.process_time()
        svc2 = Service(root, state, every=0, checkpoint_every=1e9)
        t_construct = time.perf_counter() - t0
        svc2.cycle()
        t_restart = time.perf_counter() - t0
        cpu_restart = time.process_time() - c0
        svc2.passes.worker.close()
        svc2.close()
        return t_construct, t_restart, cpu_restart

    ckpt_construct, ckpt_restart, ckpt_cpu = restart()
    shutil.rmtree(state / "checkpoints", ignore_errors=True)
    t_construct, t_restart, cpu_restart = restart()
    total_draws += 2 * block
    restart_snap = (count_snapshots(state) - before - taken) // 2
    for w in writers.values():
        w.close()

    first = statistics.fmean(costs[:tenth])
    last = statistics.fmean(costs[-tenth:])
    median = statistics.median(costs)
    s0, b0 = hist_sizes[1]
    # growth of the file from the first tenth to the end (after close, WAL checkpointed)
    per_1000 = (hist_end - b0) / max(1, snapshots - s0) * 1000
    return dict(n=n, snapshots=snapshots, taken=taken, block=block, draws=total_draws, first=first,
                last=last, cpu_first=statistics.fmean(cpu[:tenth]), cpu_last=statistics.fmean(cpu[-tenth:]),
                cpu_restart=cpu_restart, psis_first=statistics.fmean(psis[:tenth]),
                psis_last=statistics.fmean(psis[-tenth:]), median=median, slowest=max(costs),
                spikes=sum(c > 5 * median for c in costs), hist_end=hist_end, rows_left=rows_left, per_1000=per_1000, tables=tables,
                store=store_bytes, construct=t_construct, restart=t_restart, restart_snap=restart_snap,
                ckpt_construct=ckpt_construct, ckpt_restart=ckpt_restart, ckpt_cpu=ckpt_cpu,
                wall=sum(costs),
                threads={g: (statistics.fmean(v[:tenth]), statistics.fmean(v[-tenth:]), sum(v))
                         for g, v in groups.items()})


def report(r: dict, label: str):
    print(f"\n{label}: n = {r['n']:,}, {r['snapshots']:,} cycles of one {r['block']}-draw chunk "
          f"({r['taken']:,} snapshots written), {r['draws']:,} draws in all, {r['wall']:.0f} s in cycle()")
    print(f"  cost per snapshot, first tenth     {r['first'] * 1e3:9.1f} ms wall {r['cpu_first'] * 1e3:9.1f} ms CPU")
    print(f"  cost per snapshot, last tenth      {r['last'] * 1e3:9.1f} ms wall {r['cpu_last'] * 1e3:9.1f} ms CPU")
    print(f"  last / first                       {r['last'] / r['first']:9.2f}    wall {r['cpu_last'] / r['cpu_first']:9.2f}    CPU")
    loop_first, loop_last, _ = r["threads"]["loop"]
    rest_first, rest_last = loop_first - r["psis_first"], loop_last - r["psis_last"]
    print(f"  loop threads: scores() (PSIS tail) {r['psis_first'] * 1e3:9.1f} ms -> {r['psis_last'] * 1e3:.1f} ms CPU "
          f"(x{r['psis_last'] / max(r['psis_first'], 1e-9):.2f})")
    print(f"  loop threads: the rest of the cycle{rest_first * 1e3:9.1f} ms -> {rest_last * 1e3:.1f} ms CPU "
          f"(x{rest_last / max(rest_first, 1e-9):.2f})")
    for group, (first, last, total) in r["threads"].items():
        print(f"  {group + ' threads':<34} {first * 1e3:9.1f} ms -> {last * 1e3:.1f} ms CPU "
              f"(x{last / max(first, 1e-9):.2f}; {total:.0f} s in all, {total / r['draws'] * 1e3:.3f} ms per draw)")
    print(f"  median / slowest cycle             {r['median'] * 1e3:9.1f} ms / {r['slowest'] * 1e3:.0f} ms "
          f"({r['spikes']} cycles over 5x the median)")
    print(f"  history per 1,000 snapshots        {r['per_1000'] / 1e6:9.2f} MB "
          f"(file at the end: {r['hist_end'] / 1e6:.1f} MB = "
          f"{r['hist_end'] / max(1, r['taken']) / 1e3:.1f} kB per snapshot)")
    print(f"  snapshot rows left after thinning  {r['rows_left']:9,d} of {r['taken']:,}")
    top = ", ".join(f"{name} {size / 1e6:.1f} MB" for name, size in r["tables"][:4])
    if top:
        print(f"  largest parts of the history       {top}")
    print(f"  draw store on disk                 {r['store'] / 1e6:9.1f} MB "
          f"({r['store'] / r['draws'] / r['n']:.2f} bytes per draw per observation)")
    print(f"  restart, re-streaming the store    {r['restart']:9.2f} s wall {r['cpu_restart']:.2f} s CPU "
          f"(construction {r['construct']:.2f} s; first cycle wrote {r['restart_snap']} snapshot)"
          f" for {r['draws']:,} draws")
    print(f"  restart from a checkpoint          {r['ckpt_restart']:9.2f} s wall {r['ckpt_cpu']:.2f} s CPU "
          f"(construction {r['ckpt_construct']:.2f} s)")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--snapshots", type=int, default=20_000)
    ap.add_argument("--n", type=int, default=2000)
    ap.add_argument("--block", type=int, default=2, help="draws per chunk (one chunk per cycle)")
    ap.add_argument("--big-snapshots", type=int, default=2000)
    ap.add_argument("--big-n", type=int, default=10_000)
    ap.add_argument("--skip-big", action="store_true")
    ap.add_argument("--skip-small", action="store_true")
    ap.add_argument("--keep", action="store_true", help="keep the temporary root (its path is printed)")
    args = ap.parse_args(argv)
    scratch = Path(tempfile.mkdtemp(prefix="chainvigil-longrun-"))
    try:
        results = []
        if not args.skip_small:
            results.append((f"long run", scenario(args.n, args.snapshots, args.block, scratch, "small")))
        if not args.skip_big:
            results.append((f"wide run", scenario(args.big_n, args.big_snapshots, args.block, scratch, "big")))
        for label, r in results:
            report(r, label)
    finally:
        if args.keep:
            print(f"\nkept {scratch}")
        else:
            shutil.rmtree(scratch, ignore_errors=True)


if __name__ == "__main__":
    main()
