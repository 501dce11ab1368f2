"""Restart cost with and without a checkpoint, at large n and many draws, without a huge store.

A restart without a checkpoint re-streams every stored draw through the run's scorer (plus reading
it from the draw store); with a checkpoint it loads ``checkpoints/<run>.npz`` and streams only the
draws committed since.  Either way the first snapshot then scores the run (PSIS-LOO over the tail,
whose length grows like sqrt(S / r_eff)).  This bench times the three parts on the real
``RunScorer`` and the real checkpoint file, for n observations and S draws in all (4 chains):

* re-stream: ``RunScorer.add`` of every draw, in the service's rebuild blocks (store reads excluded:
  at 8 bytes per draw per observation they add their own disk time on top);
* checkpoint: ``save_checkpoint`` size and ``load_checkpoint`` time;
* first snapshot: ``scores(r_eff)`` once.

    .venv/bin/python bench/restart_checkpoint.py [--n 10000] [--draws 20000]

``--service``: the whole restart through the real service on a real state folder.  It builds one
(``--draws`` draws over 4 chains at n = ``--n``, NPZ chunks of ``--chunk`` draws through the public
writer, each deleted once committed so only the draw store takes disk), stops it cleanly (the
joint-MCSE pass over the final draws, the final snapshot, the checkpoint), then times a restart to
its first snapshot row, first from the checkpoint, then (checkpoint moved away) re-streaming every
stored draw, with wall and CPU seconds around each part (lock, recovery with the checkpoint load or
the re-stream, the last snapshot's state, the scan, ``scores()``, mixing, the verdict, the history
write, starting the joint pass, the commit).  ``--scratch DIR --keep`` keeps the folder,
``--reuse`` starts from it, ``--no-restream`` times the checkpoint restart only.

    .venv/bin/python bench/restart_checkpoint.py --service --n 10000 --draws 100000 [--chunk 1000]

Measured at n = 10,000 with 100,000 stored draws (4 x 25,000), 2026-12-03, a 2-core machine shared
with four other jobs (load average 5-9: wall times are inflated, CPU times less so):

  BEFORE (branch ``restart`` at 5ea6e3a, the code of main): from the checkpoint, the first snapshot
      31.1 s after start, 20.0 s CPU (again: 31.5 s, 19.7 s CPU).  cProfile: construction 3.98 s, of
      which the checkpoint load 3.56 s (np.load 0.48 s; copies in from_state 3.07 s: np.full of the
      1 GB buffer, np.array of every array twice); the first cycle 27.1 s: scores() 22.0 s (with a
      joint-MCSE pass over all 100,000 x 10,000 stored values started at the restart, running beside
      it), mixing 1.38 s (every parameter draw read, 0.41 s, and ranked), the history write 0.60 s,
      the commit 2.80 s (the partial chunk of each chain rewritten; after the snapshot row).
  AFTER (this branch): from the checkpoint, the first snapshot row 20.1 s after start, 6.3 s CPU for
      the whole restart: construction 2.37 s (checkpoint load 2.12 s: arrays read once, no copies),
      scores() 17.4 s wall (the load average was 7-8; the restart's CPU all told was 6.3 s), mixing
      0.03 s (the figures in force restored from the latest snapshot), verdict 0.03 s, history
      write 0.19 s, no joint pass started (the checkpoint records the last one), commit 0.85 s after
      the row.  Re-streaming every stored draw instead: the first snapshot row 248.9 s after start,
      243 s CPU (the re-stream 54.5 s; scores() 192 s: the re-streamed scorer's tail buffer, sized
      for the draws as they came, is rebuilt from the store at the first scores(), 8 GB reread).
      The checkpoint alone (this script's scorer part on the same file, K = 6,234: a 511 MB file,
      a 1 GB buffer in memory): load 5.7 s CPU and the first scores() 6.2 s CPU under load; on a
      quiet machine about 2 s and 6 s.  So the restart from the checkpoint is now the load plus one
      scores(): about 8-9 s of CPU at this size, the 10 s goal met only on a quiet machine; what is
      left is the first scores() (PSIS over the whole tail buffer), which caching the tail fits in
      the checkpoint would remove, and the load of the buffer, which grows like n sqrt(S / r_eff).
  MERGED MAIN (incremental PSIS-LOO, its tail-fit cache in the checkpoint; same command, run beside
      another benchmark on the 2 cores): from the checkpoint the first snapshot row 6.01 s after
      start (construction 4.24 s, of which the checkpoint load 3.97 s; scores() 1.63 s wall, 2.08 s
      CPU: only the rows whose tail changed are refitted; history write 0.08 s; the commit after the
      row 0.52 s); 7.16 s CPU all told.  Re-streaming instead: 172.5 s to the first row (re-stream
      39.4 s, then scores() 132.7 s rebuilding the tail buffer from the store).  The 10 s goal is met
      from the checkpoint.
"""
from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from chainvigil.ingest import REBUILD_BLOCK
from chainvigil.longrun import RunScorer, load_checkpoint, save_checkpoint

CHAINS = ("c1", "c2", "c3", "c4")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=10_000)
    ap.add_argument("--draws", type=int, default=20_000, help="draws in all (over 4 chains)")
    ap.add_argument("--service", action="store_true",
                    help="the real service on a real state folder, timed part by part")
    ap.add_argument("--chunk", type=int, default=1000, help="--service: draws per NPZ chunk while building")
    ap.add_argument("--scratch", default=None, help="--service: folder to build in (default: a temporary one)")
    ap.add_argument("--keep", action="store_true", help="--service: keep the built folder")
    ap.add_argument("--reuse", action="store_true", help="--service: use the folder --scratch holds")
    ap.add_argument("--no-restream", action="store_true", help="--service: time the checkpoint restart only")
    args = ap.parse_args(argv)
    if args.service:
        return service_restart(args)
    rng = np.random.default_rng(3)
    n, per_chain = args.n, args.draws // len(CHAINS)
    y = rng.normal(size=n)
    # no store here to rebuild from: size the tail buffer for r_eff down to 0.1 up front
    scorer = RunScorer(n, reader=None, initial_k=2 * (int(np.ceil(3 * np.sqrt(args.draws / 0.1))) + 1))
    t_add = 0.0
    for c in CHAINS:
        mu = 0.0
        for start in range(0, per_chain, REBUILD_BLOCK):
            k = min(REBUILD_BLOCK, per_chain - start)
            mus = np.empty(k)
            for t in range(k):  # AR(1) draws of the mean (rho 0.8)
                mu = 0.8 * mu + 0.6 * rng.normal(0, 1 / np.sqrt(n))
                mus[t] = mu
            ll = -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, :] - mus[:, None]) ** 2
            t0 = time.process_time()
            scorer.add(c, ll)
            t_add += time.process_time() - t0
    committed = scorer.chain_draws()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "run.npz"
        t0 = time.perf_counter()
        size = save_checkpoint(path, scorer, committed)
        t_save = time.perf_counter() - t0
        t0 = time.perf_counter()
        loaded, _ = load_checkpoint(path, n=n, committed=committed)
        t_load = time.perf_counter() - t0
    t0 = time.process_time()
    loaded.scores(loaded.r_eff())
    t_score = time.process_time() - t0
    print(f"n = {n:,}, {args.draws:,} draws in all ({per_chain:,} per chain), tail buffer K = {loaded.k}")
    print(f"  re-stream every draw through the scorer  {t_add:8.1f} s CPU "
          f"({t_add / args.draws * 1e3:.2f} ms per draw; store reads not included)")
    print(f"  checkpoint: write {t_save:6.2f} s, load {t_load:6.2f} s, {size / 1e6:,.0f} MB")
    print(f"  first snapshot's scores()                {t_score:8.1f} s CPU")
    print(f"  first snapshot after start: without checkpoint >= {t_add + t_score:.1f} s, "
          f"with checkpoint {t_load + t_score:.1f} s")


# ---------------------------------------------------------------------------------------------
# --service: the real service on a real state folder, timed part by part
# ---------------------------------------------------------------------------------------------

class PartTimers:
    """Wall and CPU seconds (this process, all threads) spent in named functions (patched in place;
    nested calls are counted in each)."""

    def __init__(self, parts):
        self.spent = {label: [0.0, 0.0] for label, _, _ in parts}
        for label, owner, attr in parts:
            self._wrap(label, owner, attr)

    def _wrap(self, label, owner, attr):
        original = getattr(owner, attr)

        def timed(*a, **kw):
            t0, c0 = time.perf_counter(), time.process_time()
            try:
                return original(*a, **kw)
            finally:
                self.spent[label][0] += time.perf_counter() - t0
                self.spent[label][1] += time.process_time() - c0

        setattr(owner, attr, timed)

    def reset(self):
        for k in self.spent:
            self.spent[k] = [0.0, 0.0]


def service_restart(args):
    """Build a state folder of ``args.draws`` draws (4 chains) at n = ``args.n`` through the real
    service (NPZ chunks of ``--chunk`` draws, deleted once committed to keep the disk small), stop it
    cleanly (checkpoint written), then time a restart to its first snapshot from the checkpoint, and
    one re-streaming every stored draw (checkpoint moved away)."""
    import shutil

    from chainvigil import ingest as ingest_module
    from chainvigil import joint_passes as passes_module
    from chainvigil import longrun as longrun_module
    from chainvigil import mixing_schedule as mixing_module
    from chainvigil import scorer_lifecycle as lifecycle_module
    from chainvigil import service as service_module
    from chainvigil import verdict as verdict_module
    from chainvigil.estimators.streaming import StreamingScorer
    from chainvigil.service import Service
    from chainvigil.storage.history import HistoryWriter
    from chainvigil.writer import ChainWriter

    timers = PartTimers([
        ("lock", service_module.Service, "_take_lock"),
        ("recovery (cut back, restore, scorer)", ingest_module.Ingest, "recover"),
        ("  checkpoint load", lifecycle_module, "load_checkpoint"),
        ("  re-stream from the store", ingest_module.Ingest, "rebuild_scorer"),
        ("last snapshot's state (trail, pointwise)", service_module.Service, "_restore_snapshot_state"),
        ("scan of the root", ingest_module.Ingest, "scan"),
        ("scores()", StreamingScorer, "scores"),
        ("mixing", mixing_module.MixingSchedule, "figures"),
        ("verdict", verdict_module, "evaluate"),
        ("history write", HistoryWriter, "add_snapshot"),
        ("joint-MCSE pass started", passes_module.JointPasses, "start"),
        ("commit", ingest_module.Ingest, "commit_pending"),
    ])
    written = []  # when each snapshot row was written (the restart's goal is the first one)
    original_add = HistoryWriter.add_snapshot

    def add_snapshot(*a, **kw):
        out = original_add(*a, **kw)
        written.append(time.perf_counter())
        return out

    HistoryWriter.add_snapshot = add_snapshot
    scratch = Path(args.scratch or tempfile.mkdtemp(prefix="chainvigil-restart-"))
    root, state = scratch / "root", scratch / "state"
    run = root / "wide"
    rng = np.random.default_rng(3)
    y = rng.normal(size=args.n)
    per_chain = args.draws // len(CHAINS)
    writers = {c: ChainWriter(run, c, param_names=("mu", "log_sigma")) for c in CHAINS}
    mu = {c: 0.0 for c in CHAINS}

    def block(c, k):
        m, x = np.empty(k), mu[c]
        for t, z in enumerate(rng.normal(0, 1 / np.sqrt(args.n), k)):  # AR(1), rho 0.8
            x = 0.8 * x + 0.6 * z
            m[t] = x
        mu[c] = x
        ll = -0.5 * np.log(2 * np.pi) - 0.5 * (y[None, :] - m[:, None]) ** 2
        return ll, np.column_stack([m, 0.01 * rng.normal(size=k)])

    t0 = time.time()
    ckpt = state / "checkpoints" / "wide.npz"
    moved = scratch / "moved.npz"
    if args.reuse and (state / "history.sqlite").is_file():  # built by an earlier --keep run
        if moved.is_file() and not ckpt.is_file():
            shutil.move(moved, ckpt)
    else:
        svc = Service(root, state, every=1e9, checkpoint_every=1e9)
        for start in range(0, per_chain, args.chunk):
            k = min(args.chunk, per_chain - start)
            for c in CHAINS:
                writers[c].append(*block(c, k))
            svc.cycle()
            for p in run.glob("*/*.npz"):
                p.unlink()  # taken and committed
        svc.cycle(force=True)
        svc.passes.worker.close()
        svc.close()
    # a clean stop as the service does it: the joint-MCSE pass over the final draws, the final
    # snapshot, the checkpoint
    svc = Service(root, state, every=0, checkpoint_every=1e9)
    svc.cycle(force=True)
    svc.passes.worker.wait(1800)  # however long the pass over every stored draw takes here
    svc.finish()
    print(f"n = {args.n:,}, {per_chain * len(CHAINS):,} stored draws ({per_chain:,} per chain); built in "
          f"{time.time() - t0:.0f} s; checkpoint {ckpt.stat().st_size / 1e6:,.0f} MB", flush=True)

    def restart(label):
        for c in CHAINS:
            writers[c].append(*block(c, 2))  # a new chunk waits: the first cycle snapshots
        timers.reset()
        written.clear()
        t0, c0 = time.perf_counter(), time.process_time()
        svc = Service(root, state, every=0, checkpoint_every=1e9)
        t1 = time.perf_counter()
        svc.cycle()
        t2, c2 = time.perf_counter(), time.process_time()
        print(f"  restart {label}: first snapshot row {written[0] - t0:6.2f} s after start "
              f"(construction {t1 - t0:.2f} s; the cycle ends with its commit at {t2 - t0:.2f} s, "
              f"{c2 - c0:.2f} s CPU)")
        for part, (wall, cpu) in timers.spent.items():
            if wall >= 0.005:
                print(f"      {part:<42} {wall:7.2f} s wall {cpu:7.2f} s CPU")
        svc.passes.worker.close()
        svc.scorers.wait_written()  # a checkpoint being written (after a re-stream)
        svc.close()

    restart("from the checkpoint")
    if not args.no_restream:
        shutil.move(ckpt, moved)
        restart("re-streaming the store")
    for w in writers.values():
        w.close()
    if not args.keep:
        shutil.rmtree(scratch, ignore_errors=True)


if __name__ == "__main__":
    main()
